"""One exception type for every problem the user can fix.

The CLI turns a :class:`ContentlabError` into one line on stderr and exit
code 2; any other exception is a bug and keeps its traceback.
"""

from __future__ import annotations


class ContentlabError(Exception):
    """A problem with the user's input or workspace, with a message written for them."""

    exit_code = 2
