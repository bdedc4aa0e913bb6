"""``forkmap check``: validate a config's inputs without running any stage.

Reads TIFF headers only (no pixel data) and the rig log through the same reader the behaviour
stage uses, so a check that passes means the run will not fail on its inputs' form.
"""

from __future__ import annotations

from pipeline.config import Settings

__all__ = ["check_inputs"]


def check_inputs(settings: Settings) -> list[str]:
    """Check every input of a session; returns human-readable summary lines.

    Raises
    ------
    InputError
        The first problem found, naming the file and page / row / column.
    """
    from pipeline.volumes.tiffio import describe_inputs

    im = settings.imaging
    info = describe_inputs(
        [str(p) for p in settings.raw_files()], layout=im.layout,
        planes_per_volume=im.planes_per_volume, flyback_planes=im.flyback_planes,
        plane_order=im.plane_order, index_regex=im.index_regex, plane_regex=im.plane_regex)
    t, z, y, x = info["shape"]
    lines = [f"imaging: {info['n_files']} {im.layout} files, {t} volumes of {z} x {y} x {x} "
             f"{info['dtype']} ({info['bytes'] / 1e9:.2f} GB), {t / im.volume_rate_hz:.1f} s "
             f"at {im.volume_rate_hz:g} volumes/s"]
    lines += [f"imaging note: {n}" for n in info["notes"]]
    if settings.behaviour is not None:
        from pipeline.behaviour.log import LogSpec, read_log

        table, report = read_log(settings.behaviour.log, LogSpec.from_settings(
            settings.behaviour), format=settings.behaviour.format)
        lines.append(f"behaviour: {report['n_rows']} rows over {report['span_s']:.1f} s at "
                     f"{report['median_rate_hz']:.1f} Hz (jitter p99 "
                     f"{report['jitter_ms_p99']:.2f} ms), targets "
                     f"{', '.join(report['targets'])}")
        if report.get("repaired_rows"):
            lines.append(f"behaviour note: {report['repaired_rows']} rows repaired")
    return lines
