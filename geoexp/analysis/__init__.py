"""After the trial: direct and spillover effects, randomization tests, displacement or diffusion.

:func:`analyse` answers the question every such trial is run for, with the
design's own randomization: did the intervention change outcomes where it was
delivered, and did it push the problem next door (displacement) or spread
the benefit (diffusion of benefits)? :func:`write_report` writes the answer
as HTML with embedded plots and a Markdown twin.
"""

from geoexp.analysis._report import distance_decay_plot, write_report
from geoexp.analysis._run import Analysis, ContrastResult, analyse, save_results
from geoexp.analysis._verdict import Verdict

__all__ = [
    "Analysis",
    "ContrastResult",
    "Verdict",
    "analyse",
    "distance_decay_plot",
    "save_results",
    "write_report",
]
