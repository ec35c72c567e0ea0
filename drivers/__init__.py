"""fieldrun drivers: transports, instrument roles, clocks and dialect files.

This package imports nothing else of fieldrun. See DEVELOPERS.md for how to add a
transport, a driver or a dialect.
"""
