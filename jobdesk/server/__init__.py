"""The jupyter_server extension: jobdesk's REST API and its background poller.

Loaded by Jupyter Server (enabled by ``jupyter-config/server-config/jobdesk.json``, which the
wheel installs) so a JupyterLab sidebar can list, inspect and act on jobs without a kernel, and
so jobs whose kernel has died still finish and download.

Settings: one ``jobdesk.settings.Settings``, built once when the extension loads and shared by
the REST handlers' desk and the poller's. The server's own (``root``, ``poll_interval``,
``feed_timeout``, ``feed_interval``) are traitlets of ``JobdeskServer``
(``c.JobdeskServer.poll_interval = 2``); docs/settings.md lists every setting.
"""

from __future__ import annotations

from jobdesk.server.config import JobdeskServer
from jobdesk.server.handlers import ChangeFeed, DeskRunner, routes
from jobdesk.server.poller import Poller

__all__ = ["ChangeFeed", "DeskRunner", "JobdeskServer", "Poller", "routes"]


SIDEBAR_MISSING = ("the jobdesk sidebar is not built: building it needs Node.js 20+ and npm at "
                   "install time. Install them, then run `pip install -e .` again; the library, "
                   "the command line and the REST API work without it.")


def sidebar_built() -> bool:
    """Whether the sidebar's bundle is there: beside the package (a source checkout) or where
    Jupyter looks for installed lab extensions."""
    from pathlib import Path

    here = Path(__file__).resolve().parents[1] / "labextension" / "package.json"
    if here.exists():
        return True
    try:
        from jupyter_core.paths import jupyter_path
    except ImportError:
        return False
    return any((Path(p) / "jobdesk-labextension" / "package.json").exists()
               for p in jupyter_path("labextensions"))


def _jupyter_server_extension_points() -> list[dict]:
    return [{"module": "jobdesk.server"}]


def _load_jupyter_server_extension(serverapp) -> None:
    """Register the REST routes and start the poller inside a running Jupyter Server."""
    from jupyter_server.utils import url_path_join

    from jobdesk.errors import ConfigError
    from jobdesk.server.config import OLD_KEY

    web_app = serverapp.web_app
    try:
        settings = JobdeskServer(parent=serverapp).settings(web_app.settings.get(OLD_KEY),
                                                            log=serverapp.log)
    except ConfigError as exc:   # the server runs on; jobdesk's routes are not added
        serverapp.log.error("jobdesk: not started: %s", exc)
        return
    runner = DeskRunner(settings=settings, log=serverapp.log)
    feed = ChangeFeed(runner, timeout=settings.feed_timeout, interval=settings.feed_interval)
    poller = Poller(settings=settings, interval=settings.poll_interval, log=serverapp.log)
    web_app.settings["jobdesk_settings"] = settings
    web_app.settings["jobdesk_runner"] = runner
    web_app.settings["jobdesk_feed"] = feed
    web_app.settings["jobdesk_poller"] = poller

    base = url_path_join(web_app.settings["base_url"], "jobdesk", "api")
    from jobdesk.server import shaping
    web_app.add_handlers(".*$", [(url_path_join(base, path), handler)
                                 for path, handler in routes() + shaping.routes()])
    poller.start()
    _stop_on_exit(serverapp, poller, runner)
    serverapp.log.info("jobdesk: REST API at %s, poller every %ss (desk root %s)",
                       base, poller.interval, runner.root_label)
    if not sidebar_built():
        serverapp.log.warning("jobdesk: %s", SIDEBAR_MISSING)


def _stop_on_exit(serverapp, poller: Poller, runner: DeskRunner) -> None:
    """Stop the poller thread and the handler threads when the server shuts down."""
    import atexit

    def stop() -> None:
        poller.stop()
        runner.close()

    atexit.register(stop)
