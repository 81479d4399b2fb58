"""The daemon: the loop, signals and reload, outages and retries, resource guards,
sd_notify. The only room that talks to systemd."""

from strayline.service._lock import LOCK_FILE, AlreadyRunning, StateLock
from strayline.service.loop import Service, watch_options_from_config

__all__ = ["LOCK_FILE", "AlreadyRunning", "Service", "StateLock", "watch_options_from_config"]
