"""Plots and widgets in a Jupyter notebook with no network: the JavaScript comes from the Jupyter server.

`extension(*names)` stands in for ``pn.extension(*names)`` (and ``hv.extension('bokeh')``) in a notebook.
Panel offers two ways of loading bokeh's and panel's JavaScript into a notebook: from its CDN (outside
servers: on a machine without network the plots stay empty, with no error in the notebook) or inline
(about 4 MB of JavaScript saved in every notebook file that runs it). A third way costs neither: panel's
own Jupyter server extension (``panel.io.jupyter_server_extension``, installed and enabled with panel)
serves bokeh's static files under ``<base>/panel-preview/static/`` and panel's under
``<base>/panel-preview/static/extensions/panel/``. `extension` loads the same bundle panel would, with
its addresses on the Jupyter server that shows the notebook; the stylesheets of each displayed object are
inlined (``pn.config.inline``: a few kB per output), so nothing at all is asked of outside hosts.

The Jupyter server's base URL is known only to the page, so the loader reads it there (from JupyterLab's
page configuration, ``#jupyter-config-data``; ``/`` where there is none).
"""

from __future__ import annotations

import json
import sys
from contextlib import contextmanager

__all__ = ["extension", "loader_js"]

_ROOT = "__WBX_JUPYTER_BASE__/panel-preview/"
_BASE_JS = ("var __wbx_base = (function () { try { var c = document.getElementById('jupyter-config-data');"
            " return JSON.parse(c.textContent).baseUrl.replace(/\\/$/, ''); } catch (e) { return ''; } })();\n")


def loader_js(*, reloading: bool = False) -> str:
    """The JavaScript that loads bokeh's and panel's bundle from the Jupyter server (addresses relative to
    the page's Jupyter base URL, found at run time)."""
    from bokeh.resources import Resources as BkResources
    from panel.io import notebook as pnb

    with pnb.set_resource_mode("server"):
        res = pnb.Resources.from_bokeh(BkResources(mode="server", root_url=_ROOT), absolute=True, notebook=True)
        bundle = pnb.bundle_resources(None, res, notebook=True, reloading=reloading, enable_mathjax=False)
        configs, requirements, exports, skip_imports = pnb.require_components()
        configs = [_bundled_paths(c) for c in configs]
        js = pnb._autoload_js(bundle=bundle, configs=configs, requirements=requirements, exports=exports,
                              skip_imports=skip_imports, ipywidget="ipywidgets_bokeh" in sys.modules,
                              reloading=reloading)
    # every address is a JSON string starting with the placeholder: make it an expression of the page's base
    js = js.replace(json.dumps(_ROOT)[:-1], '__wbx_base + "/panel-preview/')
    js = js.replace(f"'{_ROOT}", "__wbx_base + '/panel-preview/")  # require.js paths are written with single quotes
    if "__WBX_JUPYTER_BASE__" in js:  # pragma: no cover - a panel release that writes the addresses otherwise
        raise RuntimeError("wbexplore could not place the Jupyter server's address in panel's loader")
    return _BASE_JS + js


def _bundled_paths(config: dict) -> dict:
    """A require.js configuration (used by the classic notebook only) with each CDN path that panel also ships
    in its dist folder (``bundled/<extension>/<package path>``) pointed at the Jupyter server's copy."""
    from panel.io.resources import DIST_DIR

    paths = {}
    for name, url in config.get("paths", {}).items():
        if isinstance(url, str) and url.startswith("https://cdn.jsdelivr.net/npm/"):
            rel = url.removeprefix("https://cdn.jsdelivr.net/npm/")
            local = sorted(DIST_DIR.glob(f"bundled/*/{rel}.js"))
            if local:
                url = f"{_ROOT}static/extensions/panel/{local[0].relative_to(DIST_DIR).as_posix()[:-3]}"
        paths[name] = url
    return {**config, "paths": paths} if paths else config


def _load_from_jupyter(inline: bool = True, reloading: bool = False, enable_mathjax=False,
                       load_timeout: int = 5000) -> None:
    """`panel.io.notebook.load_notebook` with the bundle's addresses on the Jupyter server (same displays)."""
    import bokeh.io.notebook
    from IPython.display import publish_display_data
    from panel.io import notebook as pnb

    js = loader_js(reloading=reloading)
    css = (pnb.PANEL_DIR / "_templates" / "jupyter.css").read_text(encoding="utf-8")
    publish_display_data(data={"text/html": f'<script type="esms-options">{{"shimMode": true}}</script>'
                                            f"<style>{css}</style>"})
    publish_display_data({"application/javascript": js, pnb.LOAD_MIME: js})
    bokeh.io.notebook.curstate().output_notebook()
    comms = f"{pnb.PYVIZ_PROXY}\n{pnb._JupyterCommManager.js_manager}\n{pnb.nb_mime_js}"
    publish_display_data(data={pnb.LOAD_MIME: comms, "application/javascript": comms})


@contextmanager
def _jupyter_loader():
    """Panel and holoviews call ``load_notebook`` by name: point both names at `_load_from_jupyter`."""
    from panel.io import notebook as pnb

    mods = [pnb]
    if "holoviews.plotting.renderer" in sys.modules:
        mods.append(sys.modules["holoviews.plotting.renderer"])
    old = [m.load_notebook for m in mods]
    for m in mods:
        m.load_notebook = _load_from_jupyter
    try:
        yield
    finally:
        for m, f in zip(mods, old):
            m.load_notebook = f


def extension(*names: str) -> None:
    """Load panel (and its extensions `names`, e.g. ``"tabulator"``) in a notebook without any outside request.

    Use it instead of ``pn.extension(...)`` and ``hv.extension('bokeh')``; calling it again does nothing more.
    Outside a notebook kernel it only imports the extensions (as ``pn.extension`` does).
    """
    import panel as pn

    if "holoviews" in sys.modules:
        import holoviews.plotting.renderer  # noqa: F401  (so that its name for the loader is patched too)
    with _jupyter_loader():
        pn.extension(*names, inline=True)
