"""The detection and track tables: CSV beside ``power.csv``, with its time columns.

``detections.csv``: ``first_sample,time_utc,band,beam,bearing_deg,level_db,snr_db``, one
row per detection; ``tracks.csv``: ``first_sample,time_utc,track,state,bearing_deg,
rate_deg_per_s,snr_db``, one row per live track and power block. ``first_sample`` and
``time_utc`` are those of the power row the detection or track update comes from (the
first input sample it describes, see ``power.csv``).
"""

from __future__ import annotations

from .powertable import iso_utc

DETECTION_COLUMNS = ("first_sample", "time_utc", "band", "beam", "bearing_deg", "level_db", "snr_db")
TRACK_COLUMNS = ("first_sample", "time_utc", "track", "state", "bearing_deg", "rate_deg_per_s", "snr_db")


def header(columns) -> str:
    return ",".join(columns) + "\n"


def detections_text(detections) -> str:
    """CSV rows of detection maps (each with ``first_sample`` and ``time_utc``)."""
    return "".join(f"{int(d['first_sample'])},{iso_utc(d['time_utc'])},{int(d['band'])},{int(d['beam'])},"
                   f"{d['bearing_deg']:.3f},{d['level_db']:.3f},{d['snr_db']:.3f}\n" for d in detections)


def tracks_text(first_sample: int, utc, tracks) -> str:
    """CSV rows of one power row's live tracks."""
    t_iso = iso_utc(utc)
    return "".join(f"{int(first_sample)},{t_iso},{int(t['track'])},{t['state']},{t['bearing_deg']:.3f},"
                   f"{t['rate_deg_per_s']:.4f},{t['snr_db']:.3f}\n" for t in tracks)
