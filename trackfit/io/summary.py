"""A streaming summary of a raw event file (what ``trackfit info`` prints)."""

from __future__ import annotations

from dataclasses import asdict, dataclass, field
from pathlib import Path

import numpy as np

from .energy_label import RUN_DESIGN, counts_per_kev_from_run
from .raw import DEFAULT_BATCH_SIZE, open_raw

__all__ = ["RawSummary", "summarize_raw"]

_QUANTILES = (0.0, 0.05, 0.5, 0.95, 1.0)


@dataclass
class RawSummary:
    """Summary of a raw event file; ``as_text()`` for people, ``as_dict()`` for machines."""

    path: str
    file_size_bytes: int
    header: dict
    geometry: dict
    run_info: dict
    compression: str | None
    n_events: int
    n_scanned: int
    n_pixels_total: int
    time_first_s: float
    time_last_s: float
    roi_pixels_quantiles: list
    pulse_height_quantiles: list
    peak_adc_max: int
    truth_names: list
    bad_events: list = field(default_factory=list)
    file_problems: list = field(default_factory=list)
    pedestal_subtracted: bool = True
    trigger_mode: str = "self"
    #: scanned events that are well formed but have no ROI pixels (a file may declare many: say so)
    n_empty: int = 0

    def as_dict(self) -> dict:
        return asdict(self)

    def as_text(self) -> str:
        g = self.geometry
        span = self.time_last_s - self.time_first_s
        rate = (self.n_scanned - 1) / span if span > 0 and self.n_scanned > 1 else float("nan")
        q = ", ".join(f"{p:g}" for p in _QUANTILES)
        lines = [
            f"file          {self.path} ({self.file_size_bytes / 1e6:.2f} MB, filter {self.compression or 'none'})",
            f"format        {self.header.get('trackfit_format')} v{self.header.get('format_version')}, "
            f"written by {self.header.get('created_by')} at {self.header.get('created_utc')}",
            f"chip          {g['n_columns']} x {g['n_rows']} hexagonal pixels, pitch {g['pitch_mm'] * 1000:.1f} um, "
            f"shifted rows: {g['shifted_rows']}",
            f"events        {self.n_events}"
            + (f" ({self.n_scanned} scanned)" if self.n_scanned < self.n_events else "")
            + (f", {self.n_empty} of them empty (no ROI pixels)" if self.n_empty else ""),
            f"pixels        {self.n_pixels_total} ROI pixels in the file",
            "signal        " + ("pedestal-subtracted pulse heights" if self.pedestal_subtracted
                                else "raw ADC values, pedestals included (reconstruct with a pixel map)"),
            "triggers      " + ("random, no source (pedestal run)" if self.trigger_mode == "random"
                                else "self-triggered"),
            f"time span     {self.time_first_s:.6f} .. {self.time_last_s:.6f} s "
            f"({span:.3f} s, mean rate {rate:.1f} Hz)",
            f"ROI pixels    quantiles ({q}): {_fmt(self.roi_pixels_quantiles)}",
            f"pulse height  sum of ROI signal, ADC counts, quantiles ({q}): {_fmt(self.pulse_height_quantiles)}",
            f"peak pixel    largest pixel value {self.peak_adc_max} ADC counts",
            f"energy scale  {self._energy_scale_text()}",
            f"truth         {', '.join(self.truth_names) if self.truth_names else 'none (measured data)'}",
        ]
        width = max((len(key) for key in self.run_info), default=0)
        for key, value in self.run_info.items():
            text = str(value)
            if "\n" in text:
                text = f"({len(text.splitlines())} lines of text)"
            elif len(text) > 70:
                text = text[:66] + " ..."
            lines.append(f"run           {key:<{width}} = {text}")
        if self.file_problems:
            lines += [f"PROBLEM       {p}" for p in self.file_problems]
        if self.bad_events:
            lines.append(f"BAD EVENTS    {len(self.bad_events)} malformed (read with strict=False to keep the rest):")
            lines += [f"  event {i}: {why}" for i, why in self.bad_events[:10]]
            if len(self.bad_events) > 10:
                lines.append(f"  ... and {len(self.bad_events) - 10} more")
        else:
            lines.append("layout        every scanned event is well formed")
        return "\n".join(lines)


    def _energy_scale_text(self) -> str:
        try:
            nominal = counts_per_kev_from_run(self.run_info, path=self.path)
        except ValueError as err:
            return f"unusable: {err}"
        if nominal is None:
            return ("none in the file: reconstructed energies are uncalibrated unless the settings give "
                    "counts_per_kev")
        design = self.run_info.get(RUN_DESIGN)
        return (f"{nominal:.6g} ADC counts per keV, the nominal scale of the design"
                + (f" '{design}'" if design else "") + " (used unless the settings give counts_per_kev)")


def _quantiles(values) -> list:
    return np.quantile(values, _QUANTILES).tolist() if len(values) else []


def _fmt(values):
    return " ".join(f"{v:.6g}" for v in values)


def summarize_raw(path, *, max_events: int | None = None, batch_size: int = DEFAULT_BATCH_SIZE,
                  allow_external: bool = False) -> RawSummary:
    """Scan a raw event file in batches (bounded memory) and summarise it.

    Malformed events do not stop the scan: they are listed in ``bad_events``; well-formed events without ROI
    pixels are counted (``n_empty``). ``allow_external``: see :func:`~trackfit.io.raw.open_raw`.
    """
    path = Path(path)
    with open_raw(path, strict=False, allow_external=allow_external) as reader:
        stop = len(reader) if max_events is None else min(int(max_events), len(reader))
        n_pix_parts, sums, peak, t_first, t_last = [], [], np.iinfo(np.int16).min, np.nan, np.nan
        n_empty = 0
        for batch in reader.iter_batches(batch_size, stop=stop, with_truth=False, prefetch=True):
            batch = batch.compact()
            n_pix = batch.n_pixels
            n_pix_parts.append(n_pix)
            nonempty = n_pix > 0
            n_empty += int(np.count_nonzero(~nonempty & ~batch.bad))
            event_sum = np.zeros(len(batch))
            if nonempty.any():
                event_sum[nonempty] = np.add.reduceat(batch.signal.astype(np.int64), batch.start[:-1][nonempty])
                peak = max(peak, int(batch.signal.max()))
            sums.append(event_sum[~batch.bad])
            if len(batch):
                t_first = batch.time_s[0] if np.isnan(t_first) else t_first
                t_last = batch.time_s[-1]
        n_pix_all = np.concatenate(n_pix_parts) if n_pix_parts else np.zeros(0)
        sums_all = np.concatenate(sums) if sums else np.zeros(0)
        return RawSummary(
            path=str(path),
            file_size_bytes=path.stat().st_size,
            header=dict(reader.header),
            geometry=reader.grid.to_dict(),
            run_info=dict(reader.run_info),
            compression=reader.compression,
            n_events=len(reader),
            n_scanned=stop,
            n_pixels_total=reader.n_pixels_total,
            time_first_s=float(t_first),
            time_last_s=float(t_last),
            roi_pixels_quantiles=_quantiles(n_pix_all),
            pulse_height_quantiles=_quantiles(sums_all),
            peak_adc_max=int(peak) if stop else 0,
            truth_names=list(reader.truth_names),
            bad_events=[(int(i), why) for i, why in reader.bad_events],
            file_problems=list(reader.file_problems),
            pedestal_subtracted=reader.pedestal_subtracted,
            trigger_mode=reader.trigger_mode,
            n_empty=n_empty,
        )
