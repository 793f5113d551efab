"""Make a folium page self-contained: inline Leaflet and its drawing plugin.

folium's saved pages link Leaflet, jQuery, Bootstrap, icon fonts and plugins
from content networks; on a network that blocks them (common in agencies) the
page shows nothing. geoexp's maps use only Leaflet and Leaflet.draw, so this
module swaps those links for the script and style text of the copies shipped
with geoexp (``geoexp/maps/assets/vendor``: Leaflet 1.9.4, BSD 2-Clause;
Leaflet.draw 1.0.4, MIT; their licences and a README lie beside them), turns
the images the stylesheets name into ``data:`` URIs, and drops the links
nothing on our maps uses. The files keep their copyright headers.

If the shipped copies are missing (a broken install), the page keeps
content-network links for Leaflet and Leaflet.draw and a warning says the map
needs the internet.
"""

from __future__ import annotations

import base64
import functools
import importlib.resources
import json
import re
import warnings
from dataclasses import dataclass
from importlib.resources.abc import Traversable

LEAFLET_VERSION = "1.9.4"
LEAFLET_DRAW_VERSION = "1.0.4"

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
    folder: Traversable  # .../geoexp/maps/assets/vendor

    def file(self, relative: str) -> Traversable:
        return self.folder.joinpath(*relative.split("/"))

    def text(self, relative: str) -> str:
        return self.file(relative).read_text(encoding="utf-8")


@functools.cache
def _find_bundle() -> _Bundle | None:
    folder = importlib.resources.files("geoexp.maps").joinpath("assets", "vendor")
    bundle = _Bundle(folder)
    needed = ("leaflet/leaflet.js", "leaflet/leaflet.css", "leaflet-draw/leaflet.draw.js")
    if all(bundle.file(name).is_file() for name in needed):
        return bundle
    return None


def offline_assets_available() -> bool:
    """True if the shipped copies of Leaflet and Leaflet.draw can be inlined.

    Returns
    -------
    bool
        True when the shipped ``leaflet.js``, ``leaflet.css`` and
        ``leaflet.draw.js`` are all present.
    """
    return _find_bundle() is not None


def _data_uri(path: Traversable) -> str:
    mime = _MIME.get("." + path.name.rsplit(".", 1)[-1].lower(), "application/octet-stream")
    return f"data:{mime};base64,{base64.b64encode(path.read_bytes()).decode('ascii')}"


def _css_with_data_uris(bundle: _Bundle, relative: str, keep_images: tuple[str, ...]) -> str:
    folder = relative.rsplit("/", 1)[0]

    def swap(match: re.Match[str]) -> str:
        target = match.group(1)
        if target.startswith(("data:", "#")):
            return match.group(0)
        name = target.rsplit("/", 1)[-1]
        if name not in keep_images:
            # Marker icons etc.: nothing on our maps shows them.
            return "none"
        return f'url("{_data_uri(bundle.file(f"{folder}/{target}"))}")'

    return _CSS_URL.sub(swap, bundle.text(relative))


def _asset_for(url: str, bundle: _Bundle) -> str | None:
    """Inline text (a <script> or <style> element) that replaces a linked asset, if known."""
    name = url.rsplit("/", 1)[-1].lower()
    if name == "leaflet.js":
        return f"<script>{_no_script_end(bundle.text('leaflet/leaflet.js'))}</script>\n"
    if name == "leaflet.draw.js":
        return f"<script>{_no_script_end(bundle.text('leaflet-draw/leaflet.draw.js'))}</script>\n"
    if name == "leaflet.css":
        css = _css_with_data_uris(bundle, "leaflet/leaflet.css", ("layers.png", "layers-2x.png"))
        return f"<style>{css}</style>\n"
    if name == "leaflet.draw.css":
        css = _css_with_data_uris(
            bundle,
            "leaflet-draw/leaflet.draw.css",
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
        "the copies of Leaflet and Leaflet.draw shipped with geoexp (geoexp/maps/assets/vendor) "
        "are missing; reinstall geoexp"
        if _find_bundle() is None
        else "these assets have no installed copy"
    )
    warnings.warn(
        f"{where} loads {len(remote)} script/style files from the internet and will show "
        f"nothing without it ({reason}): {json.dumps(remote)}",
        OfflineAssetWarning,
        stacklevel=3,
    )
