"""The error a user can fix: a flag, a file or a config entry that Limner cannot use.

Library code raises InputError with a message that names the bad value; the CLI prints it
as one line and exits 1. Any other exception is a defect in Limner and keeps its
traceback (a plain ValueError from deep inside is not dressed up as the user's mistake).
InputError is a ValueError, so callers that expect one still catch it.
"""
from __future__ import annotations

import errno


class InputError(ValueError):
    """A value the user gave cannot be used; the message names it."""


# OSError numbers that describe the user's files or disk, not a defect: shown as one line
USER_ERRNOS = frozenset({errno.ENOENT, errno.EACCES, errno.EPERM, errno.EISDIR, errno.ENOTDIR,
                         errno.EEXIST, errno.ENOSPC, errno.EDQUOT, errno.EROFS, errno.ENAMETOOLONG,
                         errno.EFBIG, errno.ENODEV, errno.ENXIO})


def is_user_os_error(e: BaseException) -> bool:
    return isinstance(e, OSError) and e.errno in USER_ERRNOS
