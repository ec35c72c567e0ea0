"""fieldrun drivers: transports, instrument roles, clocks and dialect files.

This package imports nothing else of fieldrun. See DEVELOPERS.md for how to add a
transport, a driver or a dialect.
"""


def open_instrument(*args, **kwargs):
    """Build a driver; see ``drivers.factory.open_instrument`` and docs/dev-drivers.md."""
    from .factory import open_instrument as _open
    return _open(*args, **kwargs)
