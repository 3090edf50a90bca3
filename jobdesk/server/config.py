"""The server extension's settings, configured the way Jupyter configures everything (traitlets).

``c.JobdeskServer.poll_interval = 2`` in ``jupyter_server_config.py`` (or
``--JobdeskServer.poll_interval=2`` on the command line) is an *argument* to
``jobdesk.settings.build``: it wins over the environment and the config file, which the server
reads like every other process (docs/settings.md). Only what concerns the server process is a
traitlet; a desk's own settings (running limits, ...) belong in the config file, so kernels and
the server's poller apply the same ones.

The old ``ServerApp.tornado_settings["jobdesk"]`` keys still work, with a deprecation warning
in the server's log; a traitlet given as well wins over them.
"""

from __future__ import annotations

from collections.abc import Mapping

from traitlets import Float, Unicode
from traitlets.config import Configurable

from jobdesk import settings as desk_settings
from jobdesk.settings import Settings

OLD_KEY = "jobdesk"   # ServerApp.tornado_settings["jobdesk"] (deprecated)


def _help(name: str) -> str:
    return desk_settings.about(name)["meaning"]


class JobdeskServer(Configurable):
    """jobdesk's server extension: desk root, poller and change feed (None: not configured)."""

    root = Unicode(None, allow_none=True, help=_help("root")).tag(config=True)
    poll_interval = Float(None, allow_none=True, help=_help("poll_interval")).tag(config=True)
    feed_timeout = Float(None, allow_none=True, help=_help("feed_timeout")).tag(config=True)
    feed_interval = Float(None, allow_none=True, help=_help("feed_interval")).tag(config=True)

    def settings(self, old: Mapping | None = None, *, log=None,
                 environ: Mapping[str, str] | None = None) -> Settings:
        """The settings of this server: traitlets, then the deprecated tornado settings, as
        arguments over the environment, the config file and the defaults."""
        traits = self.class_trait_names(config=True)
        arguments, labels = {}, {}
        for name in traits:
            value = getattr(self, name)
            if value is not None:
                arguments[name], labels[name] = value, f"{type(self).__name__}.{name}"
        old = dict(old or {})
        for key, value in old.items():
            if key not in traits:
                if log is not None:
                    log.warning("jobdesk: tornado_settings[%r] key %r is unknown and ignored",
                                OLD_KEY, key)
                continue
            if log is not None:
                log.warning("jobdesk: tornado_settings[%r][%r] is deprecated: set "
                            "c.%s.%s in jupyter_server_config.py (docs/settings.md)",
                            OLD_KEY, key, type(self).__name__, key)
            if key not in arguments and value is not None:
                arguments[key] = value
                labels[key] = f"tornado_settings[{OLD_KEY!r}][{key!r}]"
        return desk_settings.build(environ=environ, labels=labels, **arguments)
