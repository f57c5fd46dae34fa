"""The one family of user errors: what the user can fix, said in one sentence.

Every stage raises a subclass of :class:`ThinningError` for input it cannot
use (an unreadable file, a nonsense unit, a broken manifest, a database that
is not one …); its message is one plain sentence naming what is wrong and,
where it can, what to do. The command line turns any of them into that
sentence on stderr and exit status 2. Problems in the data that still give a
result are findings (:mod:`thinning.checks`), not errors.
"""

from __future__ import annotations

import errno


class ThinningError(Exception):
    """A user-fixable problem (message: one sentence for the user)."""


#: OSError numbers of a full disk: no space, quota, file-size limit.
FULL_DISK_ERRNOS = frozenset({errno.ENOSPC, errno.EDQUOT, errno.EFBIG})
#: OSError numbers of a place the tool may not write: permission, read-only file system.
NO_WRITE_ERRNOS = frozenset({errno.EACCES, errno.EPERM, errno.EROFS})
#: The failures of the machine, not of the input: the command says so in one sentence (exit 2).
ENVIRONMENT_ERRNOS = FULL_DISK_ERRNOS | NO_WRITE_ERRNOS
