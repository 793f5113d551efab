"""After the trial: direct and spillover effects, randomization tests, displacement or diffusion.

:func:`analyse` answers the question every such trial is run for, with the
design's own randomization: did the intervention change outcomes where it was
delivered, and did it push the problem next door (displacement) or spread
the benefit (diffusion of benefits)? The report of the answer (HTML and
Markdown) is written by :func:`geoexp.report.write_report`, above this layer.
"""

from geoexp.analysis._result import Analysis, ContrastResult
from geoexp.analysis._run import analyse, save_results
from geoexp.analysis._verdict import Verdict

__all__ = ["Analysis", "ContrastResult", "Verdict", "analyse", "save_results"]
