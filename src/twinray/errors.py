"""The one exception type for bad input.

The library raises :class:`TwinrayInputError` with a message a physicist can
act on ("crystal_a of events.parquet has type float64, expected int32"); only
the command line turns it into a one-line ``error: ...`` on stderr.
"""


class TwinrayInputError(ValueError):
    """Bad input: a file, option or value that twinray cannot use.

    The message names what is wrong and where, in one line.
    """
