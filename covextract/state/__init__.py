"""The confidential state folder: lock, ledger of computed pieces, the pieces themselves.

The state folder reveals where the study's units are (through the weights
cache and the pieces): it stays with the confidential inputs, never with
outputs meant for sharing.
"""
