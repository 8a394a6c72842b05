"""Operation of a recipe over time: the refresh ledger, the lock, the schedule, the status.

Library functions only; the commands in :mod:`covextract.cli` are thin over them.
"""
