"""Which failures are worth trying again (adapter knowledge of databases and file systems).

A dropped database connection, a server restarting, a lock wait that timed out, or a network
share that stalled (EIO, ETIMEDOUT, ESTALE, ...) may pass; a refused write (a constraint), a
full disk, a permission, a lost run lock or a defect will not, and retrying them would only
repeat the failure or, worse, hide it. The night's I/O tasks are retried only for the first kind.
"""

from __future__ import annotations

import errno

from pipeline.records.run_lock import RunLocked

# SQLAlchemy's exceptions for a connection that failed or dropped, by name (only the store's own
# modules import SQLAlchemy): OperationalError, InterfaceError, DisconnectionError.
_CONNECTION_ERRORS = frozenset({"OperationalError", "InterfaceError", "DisconnectionError"})
TRANSIENT_ERRNOS = frozenset({errno.EIO, errno.ETIMEDOUT, errno.ESTALE, errno.EAGAIN, errno.ECONNRESET,
                              errno.ECONNREFUSED, errno.EHOSTUNREACH, errno.ENETUNREACH, errno.EINTR})


def is_transient(exc: BaseException | None) -> bool:
    """Whether ``exc`` (or what it was raised from) is a database or file-share failure that may pass."""
    seen = 0
    while exc is not None and seen < 10:
        if isinstance(exc, RunLocked):  # a lost or contested run lock must stop the night, never be retried
            return False
        if _from_sqlalchemy(exc) and ({k.__name__ for k in type(exc).__mro__} & _CONNECTION_ERRORS
                                      or getattr(exc, "connection_invalidated", False)):
            return True
        if isinstance(exc, OSError) and exc.errno in TRANSIENT_ERRNOS:
            return True
        exc = exc.__cause__ or exc.__context__
        seen += 1
    return False


def _from_sqlalchemy(exc: BaseException) -> bool:
    return any(k.__module__ == "sqlalchemy.exc" for k in type(exc).__mro__)
