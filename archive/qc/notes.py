"""Fixed wording shared by the qc command, the report and the documentation.

The cautions say what the numbers are not; the definitions say what each number is.
"""

from __future__ import annotations

DEFAULT_TOLERANCE = 2.0
"""Default horizontal tolerance to a check point, metres. A mean horizontal difference of
about 1-2 m to RTK is considered as good as conventional pre-layout survey for most land
seismic uses (common practice, no source); it is a parameter, not a specification."""

SENSOR_NOTE = (
    "RTK check points survey the sensor, which may sit up to about a metre from the node on "
    "its cable (common practice, no source): a difference of about a metre is not "
    "necessarily an error of the solved position."
)

SIGN_NOTE = (
    "Differences are position minus check point (dE = E - E_check): positive dE is east of "
    "the check point. The preplot column compares the planned station with the same check "
    "points: what stake-out at the planned position would have delivered."
)

PERCENTILE_NOTE = (
    "The 95th percentile uses linear interpolation between order statistics (numpy's default; "
    "definition 7 of Hyndman and Fan, 1996)."
)

ACCURACY_NOTE = (
    "CEP, R95, DRMS and 2DRMS are computed from the east/north covariance of the "
    "differences, bias removed, assuming a bivariate normal distribution: CEP and R95 are "
    "the radii holding 50 % and 95 % (computed exactly for the ellipse), DRMS = "
    "sqrt(sigma_E^2 + sigma_N^2), 2DRMS = 2 DRMS (95.4-98.2 % depending on the ellipse). "
    "The percentiles of the horizontal distance are empirical and include the bias."
)

CAUTIONS = (
    "These positions are for seismic processing. They are not a certified or legal survey "
    "and must never be presented as one.",
    "Safety setbacks for energy sources (explosives, vibrators) near wells, pipelines, "
    "buildings and water sources follow local regulations and are set out by a licensed "
    "surveyor, not from these positions.",
    SENSOR_NOTE,
)


def notes_for_output() -> list[str]:
    """Every note a qc result carries, in reading order."""
    return [SIGN_NOTE, SENSOR_NOTE, PERCENTILE_NOTE, ACCURACY_NOTE, *CAUTIONS[:2]]
