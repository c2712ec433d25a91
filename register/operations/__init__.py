"""The operations log: bypasses and overrides (asked for, authorised by a lead who is not
the requester, closed), real demands and spurious trips with what each device did, and the
findings (failures found) with their follow-up. Pages for the desk and the phone.

Writes go through ``register.services.operations`` (demands, bypasses) and
``register.operations.services`` (findings); the observed demand and spurious trip rates
are computed by ``register.operations.rates.observed_rates`` only.
"""
