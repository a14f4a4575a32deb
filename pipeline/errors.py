"""The project's exception tree.

Every message speaks of files, rows, wells, lots and limits, and says what was received and
what is allowed. Adapters wrap low-level errors with ``raise ... from exc``.
"""


class LotgateError(Exception):
    """Base of every error lotgate raises on purpose."""


class InputError(LotgateError):
    """An export cannot be read or does not match its schema."""


class SpecificationError(LotgateError):
    """A specification, method or schema file is missing a field or holds a bad value."""


class CalculationError(LotgateError):
    """The data cannot support the requested number (too few points, no convergence, ...)."""


class SigningError(LotgateError):
    """A signing identity cannot be loaded or used, or a signature cannot be made."""


class StoreError(LotgateError):
    """The results store cannot be opened or written."""


class LedgerError(LotgateError):
    """The hash-chained decision log is broken or cannot be written."""


class NotFound(LotgateError):
    """What was asked for does not exist: an unknown lot, product or attribute."""
