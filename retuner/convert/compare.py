"""One piece converted with several tunings, for ``retuner compare``: each tuning static, and
adaptive tuning live and with the lookahead plan; the outputs decoded as a synth hears them and
measured side by side (:func:`retuner.measure.report.compare`)."""

from __future__ import annotations

from retuner.convert.conversion import ConvertOptions, convert_song
from retuner.measure import metrics, report
from retuner.smf.messages import wire_stream


def compare(song, tunings, config, *, adaptive_config=None, top: int = 5) -> dict:
    """Per tuning (static), and for adaptive tuning live and with lookahead when
    ``adaptive_config`` is given (reference: the first tuning): see
    :func:`retuner.measure.report.compare`."""
    runs = [(t, config.replace(adaptive=None), False) for t in tunings]
    if adaptive_config is not None:
        runs.append((tunings[0], config.replace(adaptive=adaptive_config), False))
        runs.append((tunings[0], config.replace(adaptive=adaptive_config), True))
    decoded = []
    for tun, cfg, la in runs:
        res = convert_song(song, "compare.mid", ConvertOptions(tun, cfg, lookahead=la))
        notes = []
        for o in res.outputs:
            notes += metrics.decode_wire(wire_stream(o.data, o.path), bend_scale=cfg.bend_scale,
                                         exclude_channels=tuple(cfg.passthrough)).notes
        decoded.append((tun.id, cfg.adaptive is not None, la, notes))
    return report.compare(song.path, decoded, top)
