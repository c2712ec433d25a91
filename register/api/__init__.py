"""The REST API of the register: every write goes through ``register.services``."""
