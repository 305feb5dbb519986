"""The logbook's one error type (kept apart so the command line loads without the database layer)."""


class LogbookError(Exception):
    """The logbook cannot be used as asked: one line naming the logbook and what is wrong."""
