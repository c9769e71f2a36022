"""One exception type for every problem the user can fix.

The CLI turns a :class:`ContentlabError` into one line on stderr and exit
code 2; any other exception is a bug and keeps its traceback.
"""

from __future__ import annotations


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
