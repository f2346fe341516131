"""User-caused errors of the streamer layer.

Every error a user can cause (a missing file, an unknown channel, a stream that is not
there) is raised as :class:`InputError` with a one-line message that names the file,
channel or stream and says what is wrong and what to do. The command line prints that
line and exits non-zero; it never shows a traceback for these.
"""


class InputError(Exception):
    """A user-caused problem with input: file, channel, stream or option."""
