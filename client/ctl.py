"""``beamtap ctl``: the control commands, with readable output or JSON."""

from __future__ import annotations

import json

from beamtap.errors import UsageError

from .subscriber import Controller


def _parse_pairs(texts, what):
    out = []
    for t in texts:
        try:
            parts = [float(p) for p in t.split(",")]
        except ValueError:
            parts = []
        if len(parts) not in (1, 2):
            raise UsageError(f"{what}: got {t!r}, expected AZ or AZ,EL in degrees")
        out.append([parts[0], parts[1] if len(parts) == 2 else 0.0])
    return out


def _set_json(text: str | None, section: str) -> dict:
    """The ``--set-json`` option: a JSON object of ``[section]`` keys (empty when not given)."""
    if not text:
        return {}
    try:
        change = json.loads(text)
    except json.JSONDecodeError as exc:
        raise UsageError(f"--set-json: not JSON: {exc}") from None
    if not isinstance(change, dict) or not change:
        raise UsageError(f"--set-json: expected a non-empty JSON object of [{section}] keys")
    return change


def beams_change(args) -> dict:
    """The ``set`` map from ``beamtap ctl beams`` options."""
    change = _set_json(args.set_json, "beams")
    if args.fan:
        try:
            lo, hi, step = (float(p) for p in args.fan.split(","))
        except ValueError:
            raise UsageError(f"--fan: got {args.fan!r}, expected FROM,TO,STEP in degrees") from None
        change["fan"] = {"from_deg": lo, "to_deg": hi, "step_deg": step}
    if args.audio:
        change["audio_deg"] = _parse_pairs(args.audio, "--audio")
    if args.shading:
        change["shading"] = args.shading
    if args.band:
        try:
            lo, hi = (float(p) for p in args.band.split(","))
        except ValueError:
            raise UsageError(f"--band: got {args.band!r}, expected LOW,HIGH in Hz") from None
        change["band_hz"] = [lo, hi]
    return change


def run(args) -> int:
    with Controller(args.control, timeout_s=args.timeout) as ctl:
        if args.what == "status":
            reply = ctl.request("status")
            text = _status_text(reply["status"])
        elif args.what == "config":
            reply = ctl.request("config")
            text = (f"# config of the running service ({reply['where']}), with the beams in force "
                    f"(table {reply['beam_table']})\n" + reply["document"])
        elif args.what == "beams":
            change = beams_change(args)
            reply = ctl.request("beams", set=change) if change else ctl.request("beams")
            b = reply["beams"]
            text = (f"beam table {reply.get('beam_table', reply.get('table', {}).get('beam_table'))}: "
                    f"{len(b['directions_deg'])} power beams "
                    f"({b['directions_deg'][0][0]:g}° … {b['directions_deg'][-1][0]:g}°), "
                    f"audio {b['audio_deg']}, shading {b['shading']}, bands {b['band_hz']}")
        elif args.what == "detect":
            change = _set_json(args.set_json, "detect")
            reply = ctl.request("detect", set=change) if change else ctl.request("detect")
            text = "detect: " + ", ".join(f"{k} {v}" for k, v in reply["detect"].items())
            if "tracks_live" in reply:
                text += f"; {reply['tracks_live']} live tracks"
        elif args.what == "reload_keys":
            reply = ctl.request("reload_keys")
            k = reply["keys"]
            text = f"key folders read again: {k['operators']} operator and {k['readers']} reader keys"
        elif args.what == "record":
            reply = ctl.request("record", action=args.action, **({"what": args.kinds} if args.kinds else {}),
                                **({"label": args.label} if args.label else {}))
            text = _record_text(reply["record"])
        else:  # mark
            reply = ctl.request("mark", text=" ".join(args.text))
            m = reply["mark"]
            text = f"mark at sample {m['sample']} ({m['utc_iso']}): {m['text']}"
    print(json.dumps(reply, indent=2, default=str) if args.json else text)
    return 0


def _status_text(s: dict) -> str:
    keys = [("state", "{}"), ("source", "{}"), ("uptime_s", "{:.1f} s"), ("frames_captured", "{}"),
            ("overflows", "{}"), ("gaps", "{}"), ("frames_lost", "{}"), ("nan_samples", "{}"),
            ("clipped_samples", "{}"), ("block_ms_p50", "{:.3f} ms"), ("block_ms_p99", "{:.3f} ms"),
            ("block_cpu_ms_p99", "{:.3f} ms"),
            ("block_budget_ms", "{:.2f} ms"), ("cpu_share", "{:.0%}"), ("messages_sent", "{}"),
            ("messages_dropped", "{}"), ("latency_budget_ms", "{:.2f} ms"), ("beam_table", "{}")]
    lines = [f"{k:<18} {fmt.format(s[k])}" for k, fmt in keys if k in s and s[k] is not None]
    if s.get("record"):
        lines.append(f"{'record':<18} " + _record_text(s["record"]))
    return "\n".join(lines)


def _record_text(r: dict) -> str:
    if not r.get("recording"):
        last = f"; last session {r['session']}" if r.get("session") else ""
        err = f"; error: {r['error']}" if r.get("error") else ""
        return f"not recording{last}{err}"
    return (f"recording {', '.join(r['what'])} to {r['session']} ({r['segments']} segments, "
            f"{r['frames_written']} frames, {r['queue_dropped']} blocks dropped)")
