"""The daemon: the loop, signals and reload, outages and retries, resource guards,
sd_notify. The only room that talks to systemd."""

from strayline.service.loop import Service, watch_options_from_config

__all__ = ["Service", "watch_options_from_config"]
