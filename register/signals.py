"""Signal handlers of the register (follow-up work after writes is enqueued by services)."""
