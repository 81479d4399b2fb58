"""Watching the instrument's folders: native events plus polling, settle, catch-up.

:class:`LineWatcher` reports each line file once it is complete (:class:`ReadyFile`);
:func:`list_tree` is the one walk of the watch root (also used to find stores whose scan
folder is gone).
"""

from strayline.watch._tree import LineNames, list_tree
from strayline.watch.watcher import LineWatcher, ReadyFile, WatchOptions, WatchStatistics

__all__ = ["LineNames", "LineWatcher", "ReadyFile", "WatchOptions", "WatchStatistics", "list_tree"]
