"""The printable briefing pack: cover, overview and district pages written to one PDF."""

from __future__ import annotations

import datetime as dt
import os
from collections.abc import Iterator, Sequence
from pathlib import Path

import geopandas as gpd
import matplotlib
from matplotlib.figure import Figure

from geoexp._atomic import atomic_path
from geoexp.briefing._chrome import Pages, human_time
from geoexp.briefing._load import load_trial, plan_pages
from geoexp.briefing._pages import FIELD_NOTES, cover, district_pages, overview
from geoexp.briefing._plan import Paper
from geoexp.maps import PRINT_RC, district_outlines
from geoexp.trialfile import TrialFile

__all__ = ["FIELD_NOTES", "briefing_figures", "briefing_pack"]


def briefing_pack(
    trial: TrialFile | str | Path,
    path: str | Path,
    *,
    paper: Paper = "a4",
    districts: Sequence[str] | None = None,
    district_polygons: str | os.PathLike | gpd.GeoDataFrame | None = None,
) -> Path:
    """Write a printable briefing pack (PDF) for field teams.

    The pack holds a cover (trial name, when the assignment was drawn and when
    the pack was printed, in local time, the design hash, the number of treated
    places, a table of districts and the cautions for field staff), an overview
    map of all districts, and for each district a map of its treated places,
    numbered, with street names, a scale bar in metres, a north arrow and a
    legend, followed by the numbered list (unit id, street description,
    condition and the spec's instructions column, if any), continued on extra
    pages when it is long, and a visit-log sheet (place number, street, date,
    time in and out, officer, notes) for the team to record its visits.

    Field maps show only the treated places; every other place is a plain grey
    street, so that the pack never points a team at a control or spillover
    place. Numbers, street names, the scale bar and the north arrow are placed
    where they cover no numbered place; a number or street name that finds no
    room is listed under the map instead. Treated places have a black casing,
    so the pack reads in black and white. Text is embedded as TrueType text, so
    every unit id can be searched.

    Parameters
    ----------
    trial : TrialFile or path
        A trial file with a drawn assignment.
    path : path
        PDF file to write (atomically: a failed run leaves no partial file).
    paper : {"a4", "letter"}
        Paper size, portrait.
    districts : sequence of str, optional
        Only these districts (values of the spec's ``field.district_column``);
        default every district with treated units. Without a district column
        the pack has one district, "All units".
    district_polygons : path or GeoDataFrame, optional
        District polygons to draw as they are (shared borders once); by default
        approximate outlines around each district's units. The maps draw the same outlines
        (:func:`geoexp.maps.district_outlines`).

    Returns
    -------
    pathlib.Path
        The written file. Its page count is ``plan_briefing(...).n_pages``.

    Raises
    ------
    geoexp.errors.InputError
        Unknown paper or district, a column named in the spec missing from the
        unit layer, or no treated units.
    geoexp.errors.CRSError
        Units without a projected CRS.
    """
    from matplotlib.backends.backend_pdf import PdfPages

    data = load_trial(trial)
    plan = plan_pages(data, paper, districts)
    path = Path(path)
    metadata = {
        "Title": f"Field briefing pack: {data.trial.meta.get('name', '')}",
        "Subject": f"design {data.trial.meta.get('spec_hash', '')}",
        "Creator": "geoexp",
    }
    with matplotlib.rc_context(PRINT_RC), atomic_path(path) as tmp:
        with PdfPages(tmp, metadata=metadata) as pdf:
            n = 0
            for fig in _figures(data, plan, district_polygons):
                pdf.savefig(fig)
                n += 1
        if n != plan.n_pages:  # the plan is the contract printed on every page
            raise AssertionError(f"drew {n} pages, planned {plan.n_pages}")
    return path


def _figures(data, plan, district_polygons) -> Iterator[Figure]:
    printed_at = human_time(dt.datetime.now(dt.UTC).replace(microsecond=0))
    found, _ = district_outlines(data.frame, "district", district_polygons)
    # the loaded frame always has a "district" column, so outlines are always found
    assert found is not None
    # The series' name is the outlines' legend label: exact boundaries, or outlines drawn
    # around each district's units.
    outlines = gpd.GeoSeries(
        found.geometry.to_numpy(),
        index=found["name"],
        crs=found.crs,
        name="district" if district_polygons is not None else "district (approx.)",
    )
    pages = Pages(data, plan, printed_at)
    yield cover(pages)
    yield overview(pages, outlines)
    for district in plan.districts:
        yield from district_pages(pages, district, outlines)


def briefing_figures(
    trial: TrialFile | str | Path,
    *,
    paper: Paper = "a4",
    districts: Sequence[str] | None = None,
    district_polygons: str | os.PathLike | gpd.GeoDataFrame | None = None,
) -> Iterator[Figure]:
    """The pages of :func:`briefing_pack` as matplotlib figures, one by one, in the print style.

    Map artists carry a ``gid`` (``place``, ``place-number``, ``street-label``,
    ``scale-bar``, ``north-arrow``, ``district-label``), so their drawn extents
    can be checked or the pages drawn elsewhere.

    Parameters
    ----------
    trial : TrialFile or path
        A trial file with a drawn assignment.
    paper : {"a4", "letter"}
        Paper size, portrait.
    districts : sequence of str, optional
        Only these districts; default every district with treated units.
    district_polygons : path or GeoDataFrame, optional
        District polygons to draw as they are; by default approximate outlines
        around each district's units.

    Yields
    ------
    matplotlib.figure.Figure
        One page of the pack, in page order.
    """
    data = load_trial(trial)
    plan = plan_pages(data, paper, districts)
    with matplotlib.rc_context(PRINT_RC):
        yield from _figures(data, plan, district_polygons)
