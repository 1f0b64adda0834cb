"""The ``beamtap`` command: one entry point, one subcommand per job.

Heavy modules are imported inside each subcommand, so ``beamtap --help``
is quick and commands that do not touch a sound card work without PortAudio.
"""

from __future__ import annotations

import os

# One BLAS thread: the engine runs in one processing thread, and idle BLAS
# worker threads spin (a whole core each) between the small products of a
# real-time block loop. Must be set before numpy is first imported.
for _var in ("OPENBLAS_NUM_THREADS", "OMP_NUM_THREADS", "MKL_NUM_THREADS"):
    os.environ.setdefault(_var, "1")

import argparse  # noqa: E402
import math  # noqa: E402
import sys  # noqa: E402

from beamtap import __version__, outputs  # noqa: E402
from beamtap.errors import UsageError  # noqa: E402

BUILTIN = "builtin:demo"


class _Parser(argparse.ArgumentParser):
    """argparse with one-line errors and exit status 2."""

    def error(self, message):
        sys.stderr.write(f"{self.prog}: error: {message} (see '{self.prog} --help')\n")
        sys.exit(2)


def load_config(path):
    """Load a config file, or the built-in demo scene for ``None``/``builtin:demo``."""
    from beamtap.service import config as cfg  # noqa: PLC0415

    if path in (None, BUILTIN):
        from importlib.resources import files  # noqa: PLC0415

        return cfg.loads(files("beamtap.service").joinpath("demo.toml").read_text(), BUILTIN)
    return cfg.load(path)


def _utc_arg(text: str) -> float:
    """--start-utc: ISO 8601 (``2026-12-05T10:15:00Z``, fractions allowed) or POSIX seconds."""
    import datetime as dt  # noqa: PLC0415

    try:
        return float(text)
    except ValueError:
        pass
    try:
        t = dt.datetime.fromisoformat(text.replace("Z", "+00:00"))
    except ValueError:
        raise UsageError(f"--start-utc {text!r}: expected ISO 8601 UTC such as 2026-12-05T10:15:00Z, "
                         "or POSIX seconds") from None
    if t.tzinfo is None:
        t = t.replace(tzinfo=dt.timezone.utc)
    return t.timestamp()


def _threads(text: str) -> int:
    """``--threads N``: 1 to the engine's limit."""
    from beamtap.service.engine.beamformer import MAX_THREADS  # noqa: PLC0415

    try:
        n = int(text)
    except ValueError:
        raise argparse.ArgumentTypeError(f"{text!r}: expected a whole number from 1 to {MAX_THREADS}") from None
    if not 1 <= n <= MAX_THREADS:
        raise argparse.ArgumentTypeError(f"{text!r}: expected a whole number from 1 to {MAX_THREADS}")
    return n


def _interferer(text: str) -> tuple:
    """``--interferer AZ,DB``."""
    try:
        az, level = (float(p) for p in text.split(","))
    except ValueError:
        raise argparse.ArgumentTypeError(f"got {text!r}, expected AZ,DB (azimuth in degrees, level in dB)") from None
    if not (math.isfinite(az) and math.isfinite(level) and -360.0 <= az <= 360.0 and -100.0 <= level <= 100.0):
        raise argparse.ArgumentTypeError(f"got {text!r}, expected azimuth from -360 to 360° and level from "
                                         "-100 to 100 dB")
    return (az, level)


def _look(text: str):
    try:
        parts = [float(p) for p in text.split(",")]
    except ValueError:
        parts = []
    if len(parts) not in (1, 2) or not all(math.isfinite(p) for p in parts):
        raise argparse.ArgumentTypeError(f"got {text!r}, expected AZ or AZ,EL in degrees")
    az, el = parts[0], parts[1] if len(parts) == 2 else 0.0
    if not (-360.0 <= az <= 360.0 and -90.0 <= el <= 90.0):
        raise argparse.ArgumentTypeError(f"got {text!r}, expected azimuth from -360 to 360° and elevation from "
                                         "-90 to 90°")
    return (az, el)


# ---- subcommands ------------------------------------------------------------
def cmd_check(args):
    from beamtap.service import offline  # noqa: PLC0415

    config = load_config(args.config)
    print(offline.check_text(config))
    notes = []
    problems = offline.check_problems(config, notes)
    for line in notes:
        print(f"note          {line}")
    for line in problems:
        sys.stderr.write(f"beamtap check: error: {config.where}: {line}\n")
    return 2 if problems else 0


def cmd_simulate(args):
    from beamtap.service import offline  # noqa: PLC0415

    config = load_config(args.config)
    outputs.check_file(args.out, args.overwrite)
    frames = offline.simulate(config, args.seconds, args.out)
    print(f"wrote {args.out}: {frames} frames x {config.geometry.n_input_channels} channels "
          f"at {config.input.samplerate_hz:g} Hz (float32)")


def cmd_process(args):
    from beamtap.service import offline  # noqa: PLC0415
    from beamtap.service.offline import campaign  # noqa: PLC0415

    inputs = list(args.inputs)
    config = args.config
    if config is None and len(inputs) == 2 and inputs[0].endswith(".toml"):  # the older form: CONFIG INPUT
        config = inputs.pop(0)
    start_utc = None
    if args.start_utc is not None:
        start_utc = _utc_arg(args.start_utc)
    if args.workers < 1:
        raise UsageError(f"--workers {args.workers}: expected 1 or more")
    if args.scheduler and args.scheduler_file:
        raise UsageError("give --scheduler or --scheduler-file, not both")
    if not (math.isfinite(args.chunk_s) and args.chunk_s > 0):
        raise UsageError(f"--chunk-s {args.chunk_s:g}: expected a positive number of seconds")
    warn = lambda line: sys.stderr.write(f"beamtap process: warning: {line}\n")  # noqa: E731
    loaded = None if config is None else load_config(config)
    if args.workers > 1 or args.scheduler or args.scheduler_file:
        rc = campaign.run(loaded, inputs, args.out, args.workers, args.scheduler, args.scheduler_file, args.chunk_s,
                          args.threads, args.allow_mismatch, start_utc, args.overwrite, warn)
        if rc == 0:
            print(f"wrote {args.out}: {len(campaign.expand_inputs(inputs))} input(s) processed")
        return rc
    if start_utc is not None and len(inputs) > 1:
        raise UsageError("--start-utc dates one WAV file; give one input with it")
    for folder, result in campaign.run_serial(loaded, inputs, args.out, args.threads, args.allow_mismatch,
                                              start_utc, args.overwrite, warn):
        confirmed = sum(1 for t in result["tracks"] if t["confirmed"])
        print(f"wrote {folder}/beams.csv, power.csv, audio.wav, detections.csv, tracks.csv, summary.json: "
              f"{result['frames_processed']} frames, {result['power_rows']} power rows, {confirmed} confirmed tracks, "
              f"D = {result['bulk_delay_samples']} samples, "
              f"{result['nan_samples']} non-finite and {result['clipped_samples']} clipped samples")


def cmd_pattern(args):
    from beamtap.service import offline  # noqa: PLC0415

    config = load_config(args.config)
    nyquist = config.input.samplerate_hz / 2
    if not (math.isfinite(args.freq) and 0 < args.freq <= nyquist):
        raise UsageError(f"--freq {args.freq:g}: expected a frequency above 0 and at most {nyquist:g} Hz "
                         f"(half the sample rate of {config.where})")
    outputs.check_file(args.out, args.overwrite)
    look = args.look or ((90.0, 0.0) if config.geometry.kind == "line" else (0.0, 0.0))
    table = offline.pattern(config, args.freq, look, args.out, interferers=args.interferer or ())
    adaptive = " (delay-and-sum and MVDR)" if args.interferer else ""
    print(f"wrote {args.out}: {len(table)} directions, look {look[0]:g}°/{look[1]:g}° at {args.freq:g} Hz{adaptive}")


def cmd_serve(args):
    from beamtap.service import serve  # noqa: PLC0415

    serve.setup_logging(args.log_level)
    config = load_config(args.config)
    return serve.run(config, args.config is None, args.publish, args.control, args.ready_file, args.seconds,
                     args.threads)


def cmd_devices(args):
    from beamtap.errors import load_sounddevice  # noqa: PLC0415

    sd = load_sounddevice()
    devices = sd.query_devices()
    if not any(d["max_input_channels"] > 0 for d in devices):
        print("no input devices found (is the sound card connected and its driver loaded?)")
        return 0
    try:
        default_in = sd.query_devices(kind="input")["index"]
    except Exception:  # PortAudio names no default input
        default_in = None
    print(f"{'index':>5}  {'in':>3}  {'out':>3}  {'rate Hz':>8}  name")
    for i, d in enumerate(devices):
        mark = "*" if i == default_in else " "
        print(f"{i:>4}{mark}  {d['max_input_channels']:>3}  {d['max_output_channels']:>3}  "
              f"{d['default_samplerate']:>8g}  {d['name']}")
    print("(* default input, used when [input] has no device; [input] device takes the name or the index)"
          if default_in is not None else "(no default input device; name one in [input] device)")


def cmd_tail(args):
    from beamtap.client import tail  # noqa: PLC0415

    return tail.run(args.endpoint, args.topics, args.count, args.timeout)


def cmd_watch(args):
    from beamtap.client import watch  # noqa: PLC0415

    return watch.run(args.endpoint, args.rate, args.band, args.range_db, args.ascii, args.seconds, args.history_s,
                     args.top_db)


def cmd_ctl(args):
    from beamtap.client import ctl  # noqa: PLC0415

    return ctl.run(args)


def cmd_demo(args):
    from beamtap.client import demo  # noqa: PLC0415

    return demo.run(args.rate, args.ascii, args.seconds)


def cmd_listen(args):
    from beamtap.client import listen  # noqa: PLC0415

    device = int(args.device) if args.device is not None and args.device.isdigit() else args.device
    return listen.run(args.endpoint, args.control, args.beam, args.look, device, args.gain_db, args.limit_db,
                      args.buffer_ms, args.seconds, args.keep)


def cmd_picture(args):
    from beamtap.client import picture  # noqa: PLC0415

    if args.live == (args.power_csv is not None):
        raise UsageError("give either POWER.csv or --live (not both, not neither)")
    outputs.check_file(args.out, args.overwrite)
    if args.live:
        if not args.seconds or args.seconds <= 0:
            raise UsageError("--live needs --seconds S (a positive number)")
        data = picture.from_live(args.endpoint, args.seconds, args.band)
    else:
        data = picture.from_csv(args.power_csv, args.band)
    times, bearings, power, title, utc, marks, tracks = data
    picture.render(times, bearings, power, title, args.out, args.range_db, utc=utc, marks=marks, tracks=tracks)
    print(f"wrote {args.out}: {len(data[2])} rows x {len(data[1])} bearings, {len(tracks)} tracks")


def cmd_record(args):
    from beamtap.client import record  # noqa: PLC0415

    return record.run(args.endpoint, args.out, args.what, args.segment_s, args.sample_format, args.seconds,
                      args.label, args.idle_s, args.keep_going)


def cmd_web(args):
    from beamtap.client.subscriber import control_for  # noqa: PLC0415
    from beamtap.client.web import server  # noqa: PLC0415
    from beamtap.client.web.settings import WebSettings  # noqa: PLC0415
    from beamtap.service.serve import setup_logging  # noqa: PLC0415

    setup_logging(args.log_level)
    settings = WebSettings(args.listen, args.tls_cert, args.tls_key, args.operator_token_file,
                           args.reader_token_file, args.allow_insecure)
    return server.run(args.endpoint, args.control or control_for(args.endpoint), settings, args.ready_file,
                      args.seconds, args.parent_pid)


def cmd_mark(args):
    from beamtap.client import Controller  # noqa: PLC0415

    with Controller(args.control, timeout_s=args.timeout) as ctl:
        m = ctl.mark(" ".join(args.text))
    print(f"mark at sample {m['sample']} ({m['utc_iso']}): {m['text']}")


COMMANDS = {}


#: Client commands: they take --key and --server-key for a secured service.
CLIENTS = ("tail", "watch", "ctl", "listen", "picture", "record", "mark", "web")


def _add(sub, name, func, help_text):
    p = sub.add_parser(name, help=help_text, description=help_text)
    p.set_defaults(func=func)
    if name in CLIENTS:
        p.add_argument("--key", default=None, metavar="FILE",
                       help="your secret key file (NAME.key_secret) for a secured service (or $BEAMTAP_KEY)")
        p.add_argument("--server-key", default=None, metavar="FILE",
                       help="the service's public key file (.key) for a secured service (or $BEAMTAP_SERVER_KEY)")
    COMMANDS[name] = p
    return p


def cmd_keys(args):
    from beamtap.service.security import make_keys  # noqa: PLC0415

    public, secret, z85 = make_keys(args.name, args.out)
    print(f"public key {z85}\nwrote {public} (public: hand it out) and {secret} (secret, mode 0600: keep it here)\n"
          "a service's .key goes to its clients as --server-key; a client's .key goes into the service's "
          "clients (operators) or readers folder")


def build_parser() -> argparse.ArgumentParser:
    parser = _Parser(prog="beamtap",
                     description="Real-time delay-and-sum beamformer for hydrophone and microphone arrays.")
    parser.add_argument("--version", action="version", version=f"beamtap {__version__}")
    sub = parser.add_subparsers(title="commands", metavar="COMMAND", parser_class=_Parser)

    p = _add(sub, "check", cmd_check, "summarise an array config: aperture, sound speed, delays, beamwidth, aliasing")
    p.add_argument("config", nargs="?", default=None, help=f"config file (default: the built-in demo, {BUILTIN})")

    p = _add(sub, "simulate", cmd_simulate, "write the config's simulated scene as a multichannel float32 WAV")
    p.add_argument("config", nargs="?", default=None, help="config file (default: the built-in demo)")
    p.add_argument("--seconds", type=float, required=True, help="length in seconds")
    p.add_argument("--out", required=True, help="output WAV file")
    p.add_argument("--overwrite", action="store_true", help="replace outputs that already exist")

    p = _add(sub, "process", cmd_process, "beamform a multichannel WAV offline with the config's beams")
    p.add_argument("inputs", nargs="+", metavar="INPUT",
                   help="multichannel WAVs (16/24/32-bit integer or 32-bit float), session folders, or folders of "
                        "sessions; several go into one folder each under --out, with index.csv (the older form "
                        "CONFIG.toml INPUT also works)")
    p.add_argument("--config", default=None, help=f"config file (or {BUILTIN}); a session's own config by default")
    p.add_argument("--start-utc", default=None, metavar="TIME",
                   help="UTC of a WAV's first sample (ISO 8601 or POSIX seconds) for the power table's time_utc")
    p.add_argument("--allow-mismatch", action="store_true",
                   help="beamform a session whose array, channels, medium or sample rate differ from --config")
    p.add_argument("--out", required=True, help="output folder for beams.csv, power.csv, audio.wav, summary.json")
    p.add_argument("--overwrite", action="store_true", help="replace outputs that already exist")
    p.add_argument("--threads", type=_threads, default=None, metavar="N",
                   help="engine threads (default: [engine] threads, else every core; 1 per Dask worker; the "
                        "output is the same)")
    p.add_argument("--workers", type=int, default=1, metavar="N",
                   help="run on a Dask cluster of N worker processes started for this run (cluster extra); "
                        "default 1: on this process, as before")
    p.add_argument("--scheduler", default=None, metavar="tcp://HOST:PORT",
                   help="run on an existing Dask cluster (its scheduler's address); inputs and --out must be "
                        "on a filesystem every worker sees")
    p.add_argument("--scheduler-file", default=None, metavar="PATH", help="the same, from Dask's scheduler file")
    p.add_argument("--chunk-s", type=float, default=60.0, metavar="S",
                   help="with --workers or --scheduler: seconds of stream per chunk (default 60)")

    p = _add(sub, "pattern", cmd_pattern, "theoretical array response against azimuth for one look direction")
    p.add_argument("config", nargs="?", default=None, help="config file (default: the built-in demo)")
    p.add_argument("--freq", type=float, required=True, help="frequency in Hz")
    p.add_argument("--look", type=_look, default=None, help="look direction AZ[,EL] in degrees "
                   "(default: broadside for a line, 0° otherwise)")
    p.add_argument("--out", required=True, help="output .csv (or .png with the plot extra)")
    p.add_argument("--overwrite", action="store_true", help="replace outputs that already exist")
    p.add_argument("--interferer", type=_interferer, action="append", metavar="AZ,DB",
                   help="a plane-wave interferer at azimuth AZ, DB above each sensor's noise (repeatable): "
                        "adds the MVDR response for that scene beside delay-and-sum's")
    p = _add(sub, "serve", cmd_serve, "run the live beamformer service (publishes power and audio over ZeroMQ)")
    p.add_argument("--config", default=None, help="config file (default: the built-in demo scene)")
    p.add_argument("--publish", default=None, metavar="ENDPOINT", help="override [publish] endpoint")
    p.add_argument("--control", default=None, metavar="ENDPOINT", help="override [control] endpoint")
    p.add_argument("--ready-file", default=None, metavar="PATH",
                   help="write the bound endpoints as JSON here once serving")
    p.add_argument("--seconds", type=float, default=None, help="stop after this many seconds")
    p.add_argument("--log-level", default="INFO", choices=["DEBUG", "INFO", "WARNING", "ERROR"])
    p.add_argument("--threads", type=_threads, default=None, metavar="N",
                   help="engine threads (default: [engine] threads, else 1 for a steady block time)")

    _add(sub, "devices", cmd_devices, "list sound cards with their input channels and default sample rates")

    from beamtap.client.subscriber import DEFAULT_CONTROL, DEFAULT_PUBLISH  # noqa: PLC0415

    p = _add(sub, "tail", cmd_tail, "print one line per stream message (topic, seq, first_sample, UTC, shape, gap)")
    p.add_argument("--endpoint", default=DEFAULT_PUBLISH, help=f"service stream (default {DEFAULT_PUBLISH})")
    p.add_argument("--topics", nargs="+", default=["power", "audio", "raw", "status", "beams", "detections", "tracks"],
                   choices=["power", "audio", "raw", "status", "beams", "detections", "tracks"])
    p.add_argument("--count", type=int, default=None, help="stop after this many messages")
    p.add_argument("--timeout", type=float, default=10.0, help="seconds to wait for a message (default 10)")

    p = _add(sub, "watch", cmd_watch, "live terminal view: power across the fan, peak bearing, waterfall, status")
    p.add_argument("--endpoint", default=DEFAULT_PUBLISH, help=f"service stream (default {DEFAULT_PUBLISH})")
    p.add_argument("--rate", type=float, default=8.0, help="redraws per second (default 8)")
    p.add_argument("--band", type=int, default=0, help="which power band to show (0-based, default 0)")
    p.add_argument("--range-db", type=float, default=30.0, help="dynamic range shown, dB (default 30)")
    p.add_argument("--top-db", type=float, default=None,
                   help="fixed top of the colour scale, dB (default: follows the peak, coming down slowly)")
    p.add_argument("--history-s", type=float, default=120.0,
                   help="time the waterfall spans, however tall the terminal (default 120 s)")
    p.add_argument("--ascii", action="store_true", help="plain characters, no colour")
    p.add_argument("--seconds", type=float, default=None, help="quit after this many seconds")

    p = _add(sub, "ctl", cmd_ctl, "control a running service: status, config, beams, record, mark")
    p.add_argument("--control", default=DEFAULT_CONTROL, help=f"service control socket (default {DEFAULT_CONTROL})")
    p.add_argument("--timeout", type=float, default=5.0, help="seconds to wait for a reply (default 5)")
    p.add_argument("--json", action="store_true", help="print the reply as JSON")
    # The same options after the subcommand too ('ctl status --timeout 2'); there they override.
    after = _Parser(add_help=False)
    after.add_argument("--control", default=argparse.SUPPRESS, help=argparse.SUPPRESS)
    after.add_argument("--timeout", type=float, default=argparse.SUPPRESS, help=argparse.SUPPRESS)
    after.add_argument("--json", action="store_true", default=argparse.SUPPRESS, help=argparse.SUPPRESS)
    after.add_argument("--key", default=argparse.SUPPRESS, help=argparse.SUPPRESS)
    after.add_argument("--server-key", default=argparse.SUPPRESS, help=argparse.SUPPRESS)
    csub = p.add_subparsers(dest="what", metavar="WHAT", required=True, parser_class=_Parser)
    csub.add_parser("status", help="counters: overflows, gaps, frames lost, block time, CPU, drops", parents=[after])
    csub.add_parser("config", help="the running config as TOML", parents=[after])
    b = csub.add_parser("beams", help="show the beams, or change them (takes effect at the next block)",
                        parents=[after])
    b.add_argument("--fan", metavar="FROM,TO,STEP", help="power fan in degrees")
    b.add_argument("--audio", nargs="+", metavar="AZ[,EL]", help="audio beam directions")
    b.add_argument("--shading", choices=["uniform", "hann", "hamming", "chebyshev", "taylor"])
    b.add_argument("--band", metavar="LOW,HIGH", help="power band in Hz")
    b.add_argument("--set-json", metavar="JSON", help="any [beams] keys as a JSON object")
    r = csub.add_parser("record", help="start, stop or show recording", parents=[after])
    r.add_argument("action", choices=["start", "stop", "status"])
    r.add_argument("--what", dest="kinds", nargs="+", choices=["raw", "audio", "power"], help="what to record")
    r.add_argument("--label", default=None, help="a label for the session")
    d = csub.add_parser("detect", help="show the detection settings, or change them (from the next block)",
                        parents=[after])
    d.add_argument("--set-json", metavar="JSON", help="any [detect] keys as a JSON object, e.g. '{\"pfa\": 1e-5}'")
    csub.add_parser("reload_keys", help="a secured service reads its clients and readers folders again",
                    parents=[after])
    m = csub.add_parser("mark", help="add an event mark to the recording", parents=[after])
    m.add_argument("text", nargs="+", help="the mark's text")

    p = _add(sub, "listen", cmd_listen, "play one audio beam to an output device (starts quiet, hard-limited)")
    p.add_argument("--endpoint", default=DEFAULT_PUBLISH, help=f"service stream (default {DEFAULT_PUBLISH})")
    p.add_argument("--control", default=None,
                   help="control socket, for --look (default: the --endpoint host with the default control port)")
    p.add_argument("--keep", action="store_true", help="with --look: leave the new audio beam in place on exit")
    p.add_argument("--beam", type=int, default=0, help="audio beam index, 0-based (default 0)")
    p.add_argument("--look", type=_look, default=None, metavar="AZ[,EL]",
                   help="first point audio beam --beam toward this direction (through the control socket)")
    p.add_argument("--device", default=None, help="output device name or index (default: system default)")
    p.add_argument("--gain-db", type=float, default=-20.0, help="playback gain, dB (default -20: start low)")
    p.add_argument("--limit-db", type=float, default=-6.0, help="hard limit, dB re full scale (default -6)")
    p.add_argument("--buffer-ms", type=float, default=100.0, help="jitter buffer, ms (default 100)")
    p.add_argument("--seconds", type=float, default=None, help="stop after this many seconds")

    p = _add(sub, "picture", cmd_picture, "bearing-against-time image (PNG) from power.csv or a live capture")
    p.add_argument("power_csv", nargs="?", default=None,
                   help="a power table: process's power.csv, a recorder's power-*.csv, or a session or output folder")
    p.add_argument("--live", action="store_true", help="capture from a running service instead")
    p.add_argument("--seconds", type=float, default=None, help="with --live: how long to capture")
    p.add_argument("--endpoint", default=DEFAULT_PUBLISH, help=f"with --live: service stream (default {DEFAULT_PUBLISH})")
    p.add_argument("--band", type=int, default=0, help="which band (0-based)")
    p.add_argument("--range-db", type=float, default=30.0, help="colour range below the maximum, dB")
    p.add_argument("--out", required=True, help="output picture: .png, .svg or .pdf")
    p.add_argument("--overwrite", action="store_true", help="replace outputs that already exist")

    p = _add(sub, "record", cmd_record, "record a service's stream (from any machine) into a session folder")
    p.add_argument("--out", required=True, help="new (or empty) session folder; a recording is never overwritten")
    p.add_argument("--endpoint", default=DEFAULT_PUBLISH, help=f"service stream (default {DEFAULT_PUBLISH})")
    p.add_argument("--what", nargs="+", default=["audio", "power"], choices=["raw", "audio", "power"],
                   help="topics to record (raw needs [publish] raw = true on the service)")
    p.add_argument("--segment-s", type=float, default=60.0, help="segment length, seconds (default 60)")
    p.add_argument("--sample-format", default="float32", choices=["float32", "int24"])
    p.add_argument("--label", default="", help="a label stored in the manifest")
    p.add_argument("--seconds", type=float, default=None, help="stop after this many seconds")
    p.add_argument("--idle-s", type=float, default=5.0,
                   help="warn (and note it in the manifest) after this many seconds without data (default 5)")
    p.add_argument("--continue", dest="keep_going", action="store_true",
                   help="when the service restarts, go on in the same session (default: start a new one)")

    from beamtap.client.web.settings import DEFAULT_LISTEN  # noqa: PLC0415

    p = _add(sub, "web", cmd_web, "serve a live view of a running service to web browsers (needs the web extra)")
    p.add_argument("--endpoint", default=DEFAULT_PUBLISH, help=f"service stream (default {DEFAULT_PUBLISH})")
    p.add_argument("--control", default=None,
                   help="control socket, for pointing the listening beam (default: the --endpoint host with the "
                        "default control port)")
    p.add_argument("--listen", default=DEFAULT_LISTEN, metavar="HOST:PORT",
                   help=f"where browsers connect (default {DEFAULT_LISTEN}; off loopback needs TLS and a token file)")
    p.add_argument("--tls-cert", default=None, metavar="PEM", help="certificate chain: serve HTTPS")
    p.add_argument("--tls-key", default=None, metavar="PEM", help="the certificate's private key")
    p.add_argument("--operator-token-file", default=None, metavar="FILE",
                   help="file holding the token that may point the listening beam")
    p.add_argument("--reader-token-file", default=None, metavar="FILE", help="file holding a view-only token")
    p.add_argument("--allow-insecure", action="store_true",
                   help="serve off loopback without TLS (tokens cross the network in the clear)")
    p.add_argument("--ready-file", default=None, metavar="PATH", help="write the page's address as JSON here")
    p.add_argument("--seconds", type=float, default=None, help="stop after this many seconds")
    p.add_argument("--log-level", default="INFO", choices=["DEBUG", "INFO", "WARNING", "ERROR"])
    p.add_argument("--parent-pid", type=int, default=None, help=argparse.SUPPRESS)

    p = _add(sub, "mark", cmd_mark, "add a timestamped event mark to the service's recording")
    p.add_argument("text", nargs="+", help="the mark, e.g. 'run 3 starts'")
    p.add_argument("--control", default=DEFAULT_CONTROL, help=f"service control socket (default {DEFAULT_CONTROL})")
    p.add_argument("--timeout", type=float, default=5.0)

    p = _add(sub, "keys", cmd_keys, "make a CURVE key pair for a secured service or one of its clients")
    p.add_argument("name", help="a plain name for the key, e.g. 'pier-service' or 'lab-logger'")
    p.add_argument("--out", required=True, help="folder for NAME.key (public) and NAME.key_secret (secret)")

    p = _add(sub, "demo", cmd_demo, "the built-in demo: start the service and the live view together")
    p.add_argument("--rate", type=float, default=8.0, help="redraws per second (default 8)")
    p.add_argument("--ascii", action="store_true", help="plain characters, no colour")
    p.add_argument("--seconds", type=float, default=None, help="quit after this many seconds")
    return parser


def main(argv=None) -> int:
    from beamtap.memory import keep_freed_memory  # noqa: PLC0415

    keep_freed_memory()  # the per-block work must not fault its arrays in again (see beamtap.memory)
    parser = build_parser()
    args = parser.parse_args(argv)
    if not hasattr(args, "func"):
        parser.print_help()
        return 2
    from beamtap.client.subscriber import EndpointError, ServiceError  # noqa: PLC0415 - light, numpy/zmq only

    # Keys given on the command line reach every client socket through the environment the client
    # library reads (client/subscriber.py, secure_client).
    for option, var in (("key", "BEAMTAP_KEY"), ("server_key", "BEAMTAP_SERVER_KEY")):
        if getattr(args, option, None):
            os.environ[var] = getattr(args, option)
    try:
        return args.func(args) or 0
    except (UsageError, EndpointError, ServiceError, TimeoutError) as exc:
        sys.stderr.write(f"beamtap {args.func.__name__[4:]}: error: {exc}\n")
        return 2
    except OSError as exc:  # a path the command could not read or write: one line, the path named
        where = f"{exc.filename}: " if exc.filename else ""
        sys.stderr.write(f"beamtap {args.func.__name__[4:]}: error: {where}{exc.strerror or exc}\n")
        return 2
    except KeyboardInterrupt:
        return 130
    except BrokenPipeError:
        return 0


if __name__ == "__main__":
    sys.exit(main())
