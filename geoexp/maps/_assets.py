"""Make a folium page self-contained: inline Leaflet and its drawing plugin.

folium's saved pages link Leaflet, jQuery, Bootstrap, icon fonts and plugins
from content networks; on a network that blocks them (common in agencies) the
page shows nothing. geoexp's maps use only Leaflet and Leaflet.draw, so this
module swaps those links for the script and style text of an installed copy,
turns the images the stylesheets name into ``data:`` URIs, and drops the
links nothing on our maps uses.

The copy comes from the ``django-leaflet`` distribution, which ships Leaflet
and Leaflet.draw as static files. Its Python module is never imported (it
needs a configured Django): the files are only located and read. If it is not
installed, the page keeps content-network links for Leaflet and Leaflet.draw
and a warning says the map needs the internet.
"""

from __future__ import annotations

import base64
import functools
import importlib.util
import json
import re
import warnings
from dataclasses import dataclass
from pathlib import Path

ASSET_PACKAGE = "django-leaflet"

# Links in folium's template that our maps never use: jQuery, Bootstrap, icon
# fonts and the awesome-markers plugin serve markers and popups we do not draw.
_UNUSED = (
    "jquery",
    "bootstrap",
    "fontawesome",
    "awesome-markers",
    "awesome.rotate",
    "glyphicons",
)

_SCRIPT_TAG = re.compile(r"""<script\s+src=["']([^"']+)["']\s*>\s*</script>\s*""", re.IGNORECASE)
_LINK_TAG = re.compile(
    r"""<link\s+rel=["']stylesheet["']\s+href=["']([^"']+)["']\s*/?>\s*""", re.IGNORECASE
)
_CSS_URL = re.compile(r"""url\(\s*['"]?([^'")]+)['"]?\s*\)""")

_MIME = {".png": "image/png", ".svg": "image/svg+xml"}


class OfflineAssetWarning(UserWarning):
    """The map could not be made self-contained and will fetch its scripts online."""


@dataclass(frozen=True)
class _Bundle:
    folder: Path  # .../static/leaflet

    def text(self, relative: str) -> str:
        return (self.folder / relative).read_text(encoding="utf-8")


@functools.cache
def _find_bundle() -> _Bundle | None:
    # find_spec locates the package without running its __init__ (which needs Django).
    try:
        spec = importlib.util.find_spec("leaflet")
    except (ImportError, ValueError):
        return None
    if spec is None or not spec.submodule_search_locations:
        return None
    for root in spec.submodule_search_locations:
        folder = Path(root) / "static" / "leaflet"
        js, draw = folder / "leaflet.js", folder / "draw" / "leaflet.draw.js"
        # Another distribution also installs a module called "leaflet"; check
        # that these really are Leaflet 1.x and Leaflet.draw 1.x.
        if js.is_file() and draw.is_file():
            head = js.read_text(encoding="utf-8", errors="replace")[:200]
            draw_head = draw.read_text(encoding="utf-8", errors="replace")[:200]
            if "Leaflet 1." in head and "Leaflet.draw 1." in draw_head:
                return _Bundle(folder)
    return None


def offline_assets_available() -> bool:
    """True if an installed copy of Leaflet and Leaflet.draw can be inlined."""
    return _find_bundle() is not None


def _data_uri(path: Path) -> str:
    mime = _MIME.get(path.suffix.lower(), "application/octet-stream")
    return f"data:{mime};base64,{base64.b64encode(path.read_bytes()).decode('ascii')}"


def _css_with_data_uris(bundle: _Bundle, relative: str, keep_images: tuple[str, ...]) -> str:
    css_path = bundle.folder / relative

    def swap(match: re.Match[str]) -> str:
        target = match.group(1)
        if target.startswith(("data:", "#")):
            return match.group(0)
        name = Path(target).name
        if name not in keep_images:
            # Marker icons etc.: nothing on our maps shows them.
            return "none"
        return f'url("{_data_uri(css_path.parent / target)}")'

    return _CSS_URL.sub(swap, css_path.read_text(encoding="utf-8"))


def _asset_for(url: str, bundle: _Bundle) -> str | None:
    """Inline text (a <script> or <style> element) that replaces a linked asset, if known."""
    name = url.rsplit("/", 1)[-1].lower()
    if name == "leaflet.js":
        return f"<script>{_no_script_end(bundle.text('leaflet.js'))}</script>\n"
    if name == "leaflet.draw.js":
        return f"<script>{_no_script_end(bundle.text('draw/leaflet.draw.js'))}</script>\n"
    if name == "leaflet.css":
        css = _css_with_data_uris(bundle, "leaflet.css", ("layers.png", "layers-2x.png"))
        return f"<style>{css}</style>\n"
    if name == "leaflet.draw.css":
        css = _css_with_data_uris(
            bundle,
            "draw/leaflet.draw.css",
            ("spritesheet.png", "spritesheet-2x.png", "spritesheet.svg"),
        )
        return f"<style>{css}</style>\n"
    return None


def _no_script_end(js: str) -> str:
    # A literal "</script" inside inlined code would end the element early.
    return js.replace("</script", "<\\/script")


def _unused(url: str) -> bool:
    low = url.lower()
    return any(word in low for word in _UNUSED)


def inline_assets(html: str) -> tuple[str, list[str]]:
    """Replace content-network links in a rendered folium page by inline copies.

    Parameters
    ----------
    html : str
        A page rendered by folium.

    Returns
    -------
    html : str
        The page with Leaflet and Leaflet.draw inlined (when an installed copy
        is found) and unused links removed.
    remote : list of str
        Script and style URLs the page still loads from the network (empty
        when it is self-contained).
    """
    bundle = _find_bundle()
    remote: list[str] = []

    def replace(match: re.Match[str]) -> str:
        url = match.group(1)
        if not url.startswith(("http://", "https://", "//")):
            return match.group(0)
        if _unused(url):
            return ""
        if bundle is not None:
            inline = _asset_for(url, bundle)
            if inline is not None:
                return inline
        remote.append(url)
        return match.group(0)

    html = _SCRIPT_TAG.sub(replace, html)
    html = _LINK_TAG.sub(replace, html)
    return html, remote


def warn_if_remote(remote: list[str], where: str) -> None:
    """Warn that a saved page needs the internet for its scripts or styles."""
    if not remote:
        return
    reason = (
        f"the Python package {ASSET_PACKAGE!r} (which ships Leaflet and Leaflet.draw) is not "
        f"installed; install it with: pip install {ASSET_PACKAGE}"
        if _find_bundle() is None
        else "these assets have no installed copy"
    )
    warnings.warn(
        f"{where} loads {len(remote)} script/style files from the internet and will show "
        f"nothing without it ({reason}): {json.dumps(remote)}",
        OfflineAssetWarning,
        stacklevel=3,
    )
