"""Interactive refit: a person looks at doubtful objects, corrects them, decisions last.

:class:`RefitSession` (:mod:`.session`) is the model, with one method per action;
:class:`RefitWindow` (:mod:`.window`) is the thin matplotlib view that binds keys and clicks
to those methods; :mod:`.decisions` reads and appends the decisions log.
"""

from .decisions import append_decision, in_force, read_decisions
from .session import Item, RefitSession

__all__ = ["RefitSession", "Item", "append_decision", "read_decisions", "in_force", "RefitWindow", "snapshot"]


def __getattr__(name):  # the window needs matplotlib: import it only when asked for
    if name in ("RefitWindow", "snapshot"):
        from . import window

        return getattr(window, name)
    raise AttributeError(name)
