"""The one exception type for user mistakes: the command line prints it without a traceback."""


class TrackerError(Exception):
    """A problem with what the user gave (a file, a codebook, an option).

    The message names the file, key or column, the rows where it applies, and what is wrong.
    """
