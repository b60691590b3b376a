"""Keep every file the page asks for on this server: a lab intranet often has no way out.

The first page load is served with local resources. Parts updated or built later (a tab that is
not shown, a layer row added, a spinner) get their stylesheets from Panel at that moment, and
Panel addresses them on its CDN whenever the model is not attached to a page at that instant
(a hidden tab's models are not) or Bokeh's resource setting is unset. On a network without a way
out that is a failed request per stylesheet. :func:`serve_everything_locally` makes the setting
"server" and sends Panel's CDN fallback to this server's copy of the same files.
"""
from __future__ import annotations

__all__ = ["serve_everything_locally"]


def serve_everything_locally() -> None:
    """Make Panel address every stylesheet on this server. Calling it again does nothing."""
    from bokeh.settings import settings as bokeh_settings
    import panel.io.resources as resources
    import panel.reactive as reactive

    bokeh_settings.resources.set_value("server")
    if getattr(resources.patch_stylesheet, "keeps_files_local", False):
        return
    original = resources.patch_stylesheet

    def patch_stylesheet(stylesheet, dist_url):
        if dist_url == resources.CDN_DIST and not resources.use_cdn():
            dist_url = resources.get_dist_path()
        return original(stylesheet, dist_url)

    patch_stylesheet.keeps_files_local = True
    resources.patch_stylesheet = patch_stylesheet        # looked up at call time by panel.theme
    reactive.patch_stylesheet = patch_stylesheet         # imported by name at panel.reactive's import
