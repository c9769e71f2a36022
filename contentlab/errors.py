"""One exception type for every problem the user can fix.

The CLI turns a :class:`ContentlabError` into one line on stderr and exit
code 2; any other exception is a bug and keeps its traceback.
"""

from __future__ import annotations

import re

# C0 controls but tab, line feed and carriage return; DEL; C1 controls. None belongs in a headline, name or id:
# an escape sequence drives the terminal that prints it, a bell rings, and all are invisible in an editor.
CONTROL_CHARS = re.compile("[\x00-\x08\x0b\x0c\x0e-\x1f\x7f-\x9f]")


def visible(text: str) -> str:
    """``text`` with every control character written as ``\\xNN``, so a message that quotes the user's input
    cannot drive the terminal that shows it."""
    return CONTROL_CHARS.sub(lambda m: f"\\x{ord(m.group()):02x}", str(text))


class ContentlabError(Exception):
    """A problem with the user's input or workspace, with a message written for them."""

    exit_code = 2
    http_status = 400  # what the web API answers (see contentlab.web.services.user_error)


class WorkspaceBusy(ContentlabError):
    """Another command holds the workspace's write lock for longer than we wait: try again later."""

    http_status = 503


class WorkspaceReadOnly(ContentlabError):
    """A write to a workspace the user may not change."""

    http_status = 403


class WorkspaceDiskFull(ContentlabError):
    """A write to a workspace whose disk has no room left: free some space, then try again."""

    http_status = 507  # Insufficient Storage (RFC 4918)
