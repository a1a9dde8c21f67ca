"""Errors that are reported to the user as one clear line (never a traceback)."""


class UserError(Exception):
    """Bad input or configuration; the message is shown as is and the command exits non-zero."""


class RejectedInput(UserError):
    """An input object that cannot be graded at all (not DICOM, not an SR, no echo data)."""
