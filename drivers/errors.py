"""Error types raised by transports and instrument drivers.

Every error carries *where* (the instrument or resource) and *why*, so the CLI can print
one clear line without a traceback.
"""
from __future__ import annotations


class DriverError(Exception):
    """An instrument or transport did not do what was asked.

    ``where`` names the instrument (role and address) or the resource; ``why`` is the
    plain-words reason.
    """

    def __init__(self, where: str, why: str):
        self.where = where
        self.why = why
        super().__init__(f"{where}: {why}")


class TransportTimeout(DriverError):
    """A call did not complete within its timeout. The session is untrusted until
    resynchronised (see ``Transport.resync``)."""


class TransportAborted(DriverError):
    """A blocked call was woken by ``Transport.abort()`` from another thread."""


class IdentityMismatch(DriverError):
    """``*IDN?`` did not report the model or serial number the rig file names."""


class ArmRefused(DriverError):
    """``arm()`` found something that forbids energising (output already on, voltage
    not near zero, a readback outside tolerance, interlock open, bad gauge reading)."""


class LatchedOff(DriverError):
    """An energising command was refused because the instrument was safed and has not
    been re-armed."""


class LockHeld(DriverError):
    """Another fieldrun process holds the exclusive lock on this instrument resource."""


class UnsafeStateError(DriverError):
    """Output-off could not be confirmed after every escalation. The caller must treat
    the rig as possibly energised: exit 5, mark the rig, raise the alarm."""
