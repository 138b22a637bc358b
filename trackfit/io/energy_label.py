"""What the ``energy_kev`` column of an event table means, and how to label it.

``energy_kev = pulse_height / counts_per_kev`` is only an energy in keV when ``counts_per_kev`` (ADC counts per
keV) is known for the detector that took the data. The reconstruction records which scale it used in the table
provenance (``docs/table-format.md``): the value and where it came from.

======================  ==============================================================================
source                  meaning
======================  ==============================================================================
``"settings"``          the user's reconstruction settings gave ``counts_per_kev``
``"raw file"``          the raw file's ``/run`` attribute ``nominal_counts_per_kev`` (written by the
                        simulator from its design: gas gain x 1000 / W / electrons per ADC count)
``"none"``              neither: a placeholder scale was used and the energies are **uncalibrated**
``"calibration"``       an energy scale of a calibration file was applied afterwards (trackfit does not
                        write it: set it in the provenance of tables you store after ``Calibration.apply``;
                        in memory, pass ``calibrated=True`` to the label functions)
======================  ==============================================================================

Every figure or printout of energies asks :func:`energy_axis_label` for its label, so uncalibrated energies are
never shown as plain keV.

Examples
--------
>>> energy_axis_label({"energy_scale_source": "none", "energy_scale_counts_per_kev": 3333.3})
'energy [keV] (uncalibrated)'
>>> energy_axis_label({"energy_scale_source": "raw file", "energy_scale_counts_per_kev": 2400.0})
'energy [keV]'
>>> energy_axis_label({"energy_scale_source": "none"}, calibrated=True)
'energy [keV]'
"""

from __future__ import annotations

import math
from collections.abc import Mapping

from .errors import FileFormatError

__all__ = ["RUN_COUNTS_PER_KEV", "RUN_DESIGN", "SCALE_KEY", "SOURCE_KEY", "ENERGY_SCALE_SOURCES",
           "counts_per_kev_from_run", "energy_scale_source", "energy_is_calibrated", "energy_axis_label",
           "format_energy", "describe_energy_scale"]

#: optional ``/run`` attribute of a raw file: nominal ADC counts per keV of the detector design
RUN_COUNTS_PER_KEV = "nominal_counts_per_kev"
#: optional ``/run`` attribute of a raw file: name of the detector design (e.g. a simulator preset)
RUN_DESIGN = "design"
#: table provenance entry: the ADC counts per keV that made ``energy_kev``
SCALE_KEY = "energy_scale_counts_per_kev"
#: table provenance entry: where that scale came from (one of :data:`ENERGY_SCALE_SOURCES`)
SOURCE_KEY = "energy_scale_source"
#: source -> what it means, as printed by :func:`describe_energy_scale`
ENERGY_SCALE_SOURCES = {
    "settings": "from the reconstruction settings (counts_per_kev)",
    "raw file": f"from the raw file (/run attribute {RUN_COUNTS_PER_KEV}: the nominal scale of its design)",
    "none": "none known: neither the settings nor the raw file give counts_per_kev",
    "calibration": "from the energy scale of a calibration file",
}
_CALIBRATED_SOURCES = ("settings", "raw file", "calibration")


def counts_per_kev_from_run(run_info: Mapping, *, path=None) -> float | None:
    """The nominal ADC counts per keV stored in a raw file's ``/run`` attributes, or None when absent.

    Raises
    ------
    FileFormatError
        The attribute is present but not a positive finite number (a number stored as text included); the message
        names the file, the group ``/run`` and the attribute (a ``ValueError``).
    """
    if RUN_COUNTS_PER_KEV not in run_info:
        return None
    value = run_info[RUN_COUNTS_PER_KEV]
    try:
        number = float(value)
    except (TypeError, ValueError):
        number = math.nan
    if isinstance(value, bool | str | bytes) or not math.isfinite(number) or number <= 0:
        raise FileFormatError(path if path is not None else "(run information)",
                              f"attribute '{RUN_COUNTS_PER_KEV}': expected a positive number of ADC counts per keV "
                              f"(got {value!r})", dataset="/run")
    return number


def energy_scale_source(provenance: Mapping | None) -> str | None:
    """The recorded source of the energy scale (see the module docstring), or None when the table has none."""
    if not provenance:
        return None
    source = provenance.get(SOURCE_KEY)
    return source if source in ENERGY_SCALE_SOURCES else None


def energy_is_calibrated(provenance: Mapping | None) -> bool:
    """False only when the provenance says the energies were made without a known scale (source ``"none"``).

    Tables that do not record a source (made by hand, or before the source was recorded) count as calibrated:
    nothing says otherwise.
    """
    return energy_scale_source(provenance) != "none"


def energy_axis_label(provenance: Mapping | None = None, *, calibrated: bool = False,
                      quantity: str = "energy") -> str:
    """Axis label (or printout label) for energies of a table: ``"energy [keV]"`` or, when the table's energy scale
    is unknown, ``"energy [keV] (uncalibrated)"``.

    Parameters
    ----------
    provenance : mapping, optional
        The table's provenance (``EventTable.provenance``).
    calibrated : bool
        The energies have been replaced by those of a calibration's energy scale since (e.g. by
        ``Calibration.apply``): always label them keV.
    quantity : str
        The word in front of the unit.
    """
    label = f"{quantity} [keV]"
    if calibrated or energy_is_calibrated(provenance):
        return label
    return f"{label} (uncalibrated)"


def format_energy(value_kev: float, provenance: Mapping | None = None, *, calibrated: bool = False,
                  digits: int = 4) -> str:
    """One energy as text for titles and printouts: ``"5.873 keV"``, or ``"5.873 keV (uncalibrated)"``.

    Examples
    --------
    >>> format_energy(5.8731, {"energy_scale_source": "none"})
    '5.873 keV (uncalibrated)'
    """
    text = f"{value_kev:.{digits}g} keV"
    return text if calibrated or energy_is_calibrated(provenance) else f"{text} (uncalibrated)"


def describe_energy_scale(provenance: Mapping | None) -> str:
    """One line on the energy scale of a table, for summaries (``trackfit info``, ``EventTable.summary``)."""
    source = energy_scale_source(provenance)
    if source is None:
        return "energy scale: not recorded"
    value = provenance.get(SCALE_KEY)
    amount = f"{float(value):.6g} ADC counts per keV" if value is not None else "ADC counts per keV not recorded"
    if source == "none":
        return (f"energy scale: none known (no counts_per_kev in the settings or the raw file): energy_kev uses a "
                f"placeholder of {amount} and is UNCALIBRATED")
    return f"energy scale: {amount}, {ENERGY_SCALE_SOURCES[source]}"
