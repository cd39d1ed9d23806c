"""The ``stripstitch`` command: parses arguments, calls the public API, writes files.

Subcommands: ``inspect``, ``calibrate``, ``stitch``, ``simulate``, ``evaluate``, ``compare``,
``demo``.
``main(argv=None) -> int`` returns the exit code (0 ok, 1 processing failed or unusable swipe,
2 usage error or bad input), so tests can call ``main(["stitch", "in.npy", "-o", "out.tiff"])``.
"""

from __future__ import annotations

import argparse
import inspect as _inspect
import json
import os
import sys
import tempfile
import textwrap
from pathlib import Path

import numpy as np

from . import __version__
from . import calibrate as _cal
from . import io as _io
from ._types import ReconstructionError

__all__ = ["main", "EXIT_OK", "EXIT_FAILED", "EXIT_USAGE", "CAUTION", "find_demo_data"]

EXIT_OK = 0
EXIT_FAILED = 1
EXIT_USAGE = 2

CAUTION = ("stripstitch: caution: fingerprint images are biometric personal data; store and "
           "share them only as your local privacy law allows. Nothing is sent anywhere.")

EXIT_CODES_HELP = """\
exit codes:
  0  success
  1  processing failed, or the swipe is unusable (outputs are still written)
  2  usage error or bad input (unreadable file, bad manifest, bad option, output exists)
"""


class _Failure(Exception):
    """Processing failed: exit code 1."""


class _BadInput(Exception):
    """Bad input or usage: exit code 2."""


class _Parser(argparse.ArgumentParser):
    """ArgumentParser whose errors are one line on stderr and exit code 2."""

    def error(self, message):
        self.exit(EXIT_USAGE, f"{self.prog}: error: {message} (see '{self.prog} --help')\n")


class _Out:
    """Where results go: human text or one JSON document on stdout, notes on stderr."""

    def __init__(self, args):
        self.quiet = bool(getattr(args, "quiet", False))
        self.json = bool(getattr(args, "json", False))
        self.progress_ok = sys.stderr.isatty() and not self.quiet

    def text(self, line=""):
        if not self.json and not self.quiet:
            print(line)

    def note(self, line):
        if not self.quiet:
            print(f"stripstitch: {line}", file=sys.stderr)

    def document(self, obj):
        if self.json:
            print(json.dumps(_io._plain(obj), indent=2, allow_nan=False))

    def progress(self, i, n, label):
        if self.progress_ok:
            width = 24
            done = int(width * i / max(n, 1))
            end = "\n" if i >= n else ""
            sys.stderr.write(f"\r[{'#' * done}{'.' * (width - done)}] {i}/{n} {label[:40]:<40}{end}")
            sys.stderr.flush()


# ----------------------------------------------------------------------------------------------
# shared helpers
# ----------------------------------------------------------------------------------------------

def _read_stack(path, args, *, min_frames=2):
    stack = _io.read_frames(path, manifest=getattr(args, "manifest", None), min_frames=min_frames)
    pitch = getattr(args, "pitch_um", None)
    rate = getattr(args, "frame_rate_hz", None)
    if pitch is not None or rate is not None:
        stack = _io.FrameStack(
            frames=stack.frames, pitch_um=pitch if pitch is not None else stack.pitch_um,
            frame_rate_hz=rate if rate is not None else stack.frame_rate_hz,
            timestamps_s=stack.timestamps_s, counters=stack.counters,
            dropped_after=stack.dropped_after, dropped_count=stack.dropped_count,
            source=stack.source, kind=stack.kind, manifest=stack.manifest, notes=stack.notes)
    return stack


def _positive(name):
    def parse(text):
        try:
            v = float(text)
        except ValueError:
            raise argparse.ArgumentTypeError(f"{name} must be a number > 0; got {text!r}") from None
        if not (np.isfinite(v) and v > 0):
            raise argparse.ArgumentTypeError(f"{name} must be a finite number > 0; got {text!r}")
        return v
    return parse


def _count(name, lo=1):
    def parse(text):
        try:
            v = int(text)
        except ValueError:
            raise argparse.ArgumentTypeError(f"{name} must be an integer >= {lo}; got {text!r}") from None
        if v < lo:
            raise argparse.ArgumentTypeError(f"{name} must be an integer >= {lo}; got {text!r}")
        return v
    return parse


def _inputs_of(*paths, manifest=None):
    """Input files (and a dump's manifest candidates) that outputs must never replace."""
    out = []
    for p in paths:
        if p is None:
            continue
        p = Path(p)
        out += [p, p.with_suffix(".json"), Path(str(p) + ".json")]
    if manifest is not None:
        out.append(Path(manifest))
    return out


def _check_outputs(paths, force, *, inputs=()):
    """Refuse before any work when an output exists (and --force is not given), or would
    replace an input file or a dump's manifest."""
    protected = {Path(q).resolve() for q in inputs if Path(q).exists()}
    seen = set()
    for p in paths:
        if p is not None and Path(p).resolve() in protected:
            raise _BadInput(f"output {str(p)!r} would replace an input file (or a dump's "
                            "manifest); choose another name")
    for p in paths:
        if p is None:
            continue
        p = Path(p)
        if p.resolve() in seen:
            raise _BadInput(f"output {str(p)!r} is named twice")
        seen.add(p.resolve())
        if p.exists() and not force:
            raise _BadInput(f"output {str(p)!r} exists already; pass --force to replace it")
        if not p.parent.is_dir() and str(p.parent):
            raise _BadInput(f"output folder {str(p.parent)!r} of {str(p)!r} does not exist")


def _stitch_function():
    import stripstitch
    fn = getattr(stripstitch, "stitch", None)
    if fn is None:
        try:
            from .pipeline import stitch as fn
        except ImportError:
            raise _Failure("the reconstruction (stripstitch.stitch) is not available in this "
                           "installation") from None
    return fn


def _load_calibration(args, stack, out):
    """Calibration from --calibration FILE, or inferred with --auto-calibrate; else None."""
    if getattr(args, "calibration", None):
        cal = _cal.Calibration.load(args.calibration)
        if cal.shape != stack.frames.shape[1:]:
            raise _BadInput(f"--calibration {args.calibration!r} is for {cal.shape[0]} x "
                            f"{cal.shape[1]} plates but the frames are {stack.frames.shape[1]} x "
                            f"{stack.frames.shape[2]}")
        return cal
    if getattr(args, "auto_calibrate", False):
        try:
            cal = _cal.calibrate_from_frames(stack.frames, n_blank=getattr(args, "blank_frames", None))
        except _cal.CalibrationError as exc:
            out.note(f"no calibration: {exc}")
            return None
        out.note(f"calibrated from {cal.notes.get('blank_source')}")
        return cal
    return None


def _stitch(stack, args, cal):
    fn = _stitch_function()
    kw = {"pitch_um": stack.pitch_um if stack.pitch_um is not None else 50.8,
          "frame_rate_hz": stack.frame_rate_hz, "timestamps_s": stack.timestamps_s,
          "calibration": cal, "mode": getattr(args, "mode", "default")}
    if getattr(args, "output_pitch_um", None) is not None:
        kw["output_pitch_um"] = args.output_pitch_um
    try:
        return fn(stack.frames, **kw)
    except ReconstructionError as exc:
        raise _Failure(f"no image could be made: {exc}") from None


def _report_document(result, stack, cal, image_meta=None):
    doc = {"software": f"stripstitch {__version__}", "input": stack.source,
           "input_kind": stack.kind, "frames": list(stack.frames.shape),
           "pitch_um": stack.pitch_um, "frame_rate_hz": stack.frame_rate_hz,
           "dropped_frames": stack.dropped_table(),
           "report": result.report.to_dict(),
           "events": [e.to_dict() for e in result.events],
           "image_shape": list(result.image.shape),
           "output_pitch_um": np.asarray(result.pitch_um).tolist(),
           "origin_px": np.asarray(result.origin_px).tolist(),
           "calibration": None if cal is None else cal.summary()}
    if image_meta is not None:
        doc["image"] = image_meta
    return doc


def _image_extent_mm(result):
    finite = np.isfinite(result.image)
    if not finite.any():
        return 0.0, 0.0
    rows = np.flatnonzero(finite.any(axis=1))
    cols = np.flatnonzero(finite.any(axis=0))
    p = np.broadcast_to(np.asarray(result.pitch_um, float), (2,))
    return ((rows[-1] - rows[0] + 1) * p[0] / 1000.0, (cols[-1] - cols[0] + 1) * p[1] / 1000.0)


# ----------------------------------------------------------------------------------------------
# inspect
# ----------------------------------------------------------------------------------------------

def _inspect_info(stack, cal):
    frames = stack.frames
    t, r, c = frames.shape
    presence = _cal.finger_presence(frames, calibration=cal)
    empty = presence.score <= 0.02
    info = {"input": stack.source, "kind": stack.kind, "n_frames": t, "rows": r, "columns": c,
            "dtype": str(frames.dtype), "code_range": [int(frames.min()), int(frames.max())]
            if frames.dtype.kind in "ui" else [float(frames.min()), float(frames.max())],
            "pitch_um": stack.pitch_um, "frame_rate_hz": stack.frame_rate_hz,
            "duration_s": stack.duration_s,
            "width_mm": None if stack.pitch_um is None else c * stack.pitch_um / 1000.0,
            "dropped": {"n_dropped": stack.n_dropped, "gaps": stack.dropped_table()}}
    if stack.manifest is not None:
        m = stack.manifest
        info["layout"] = {"container_bits": m.container_bits, "value_bits": m.value_bits,
                          "byte_order": m.byte_order, "order": m.order,
                          "frame_header_bytes": m.frame_header_bytes,
                          "orientation": {"transpose": m.transpose, "flip_along": m.flip_along,
                                          "flip_across": m.flip_across}}
    partial = presence.partial()
    info["finger"] = {"present": presence.any, "first_frame": presence.first,
                      "last_frame": presence.last, "n_present": presence.n_present,
                      "n_partial": int(partial.sum()), "n_empty": int(empty.sum()),
                      "max_score": float(presence.score.max())}
    # noise: from the calibration, else the temporal std over empty frames
    if cal is not None:
        noise = float(np.nanmedian(cal.noise)) if np.isfinite(cal.noise).any() else None
        noise_src = "calibration"
    elif empty.sum() >= 2:
        noise = float(np.median(frames[empty].astype(np.float64).std(axis=0, ddof=1)))
        noise_src = f"{int(empty.sum())} empty frames"
    else:
        noise, noise_src = presence.noise, "quietest frames (rough)"
    info["noise_codes"] = noise
    info["noise_source"] = noise_src
    if presence.any:
        sel = presence.present
        v = cal.apply(frames[sel]) if cal is not None else (
            frames[sel].astype(np.float64) - np.percentile(frames.astype(np.float64), 5, axis=0))
        lo, hi = np.percentile(v, [1, 99])
        contrast = float(hi - lo)
        info["contrast_codes"] = contrast
        info["contrast_to_noise_db"] = (float(20 * np.log10(contrast / noise))
                                        if noise and noise > 0 and contrast > 0 else None)
    else:
        info["contrast_codes"] = None
        info["contrast_to_noise_db"] = None
    fr = frames[presence.present] if presence.n_present >= 2 else None
    bl = frames[empty] if empty.any() else None
    if cal is not None:
        bp = cal.bad_plates()
    elif fr is not None or bl is not None:
        bp = _cal.find_bad_plates(fr, blank_frames=bl)
    else:
        bp = None
    if bp is not None:
        info["bad_plates"] = {"counts": bp.counts(), "columns": list(bp.columns),
                              "plates": bp.listing()}
    return info


def _cmd_inspect(args, out):
    stack = _read_stack(args.input, args)
    cal = _cal.Calibration.load(args.calibration) if args.calibration else None
    if cal is not None and cal.shape != stack.frames.shape[1:]:
        raise _BadInput(f"--calibration is for {cal.shape} plates; the frames are "
                        f"{stack.frames.shape[1:]}")
    info = _inspect_info(stack, cal)
    out.document(info)
    f = info["finger"]
    fmt = lambda v, spec: "unknown" if v is None else format(v, spec)  # noqa: E731
    out.text(f"input        {info['input']} ({info['kind']})")
    out.text(f"geometry     {info['n_frames']} frames x {info['rows']} rows x {info['columns']} "
             f"columns, {info['dtype']}, codes {info['code_range'][0]}..{info['code_range'][1]}")
    out.text(f"pitch        {fmt(info['pitch_um'], '.2f')} um; width {fmt(info['width_mm'], '.2f')} mm")
    out.text(f"timing       {fmt(info['frame_rate_hz'], '.1f')} Hz, duration "
             f"{fmt(info['duration_s'], '.4f')} s")
    d = info["dropped"]
    where = ", ".join(f"{g['missing']} after frame {g['after_frame']}" for g in d["gaps"][:8])
    more = " ..." if len(d["gaps"]) > 8 else ""
    out.text(f"dropped      {d['n_dropped']} frame(s)" + (f": {where}{more}" if where else ""))
    if f["present"]:
        out.text(f"finger       present in frames {f['first_frame']}..{f['last_frame']} "
                 f"({f['n_present']} frames, {f['n_partial']} with partial contact, "
                 f"{f['n_empty']} empty)")
    else:
        out.text("finger       NONE: no frame shows a finger (a blank capture?)")
    out.text(f"noise        {fmt(info['noise_codes'], '.3f')} codes rms ({info['noise_source']})")
    out.text(f"contrast     {fmt(info['contrast_codes'], '.1f')} codes (1-99 %), "
             f"{fmt(info['contrast_to_noise_db'], '.1f')} dB over noise")
    if "bad_plates" in info:
        b = info["bad_plates"]
        counts = ", ".join(f"{k} {v}" for k, v in b["counts"].items())
        plates = " ".join(f"({p['row']},{p['column']}){p['kind'][0]}" for p in b["plates"][:12])
        more = " ..." if len(b["plates"]) > 12 else ""
        out.text(f"bad plates   {counts}; columns {b['columns'] or 'none'}"
                 + (f"; {plates}{more}" if plates else ""))
    return EXIT_OK


# ----------------------------------------------------------------------------------------------
# calibrate
# ----------------------------------------------------------------------------------------------

def _cmd_calibrate(args, out):
    _check_outputs([args.output], args.force,
                   inputs=_inputs_of(args.input, args.blank, args.reference, manifest=args.manifest))
    if args.input is None and args.blank is None:
        raise _BadInput("calibrate needs an input swipe, --blank FILE, or both")
    stack = _read_stack(args.input, args) if args.input is not None else None
    ref = None
    if args.reference is not None:
        ref = _io.read_frames(args.reference, min_frames=1).frames
    try:
        if args.blank is not None:
            blanks = _io.read_frames(args.blank, min_frames=1).frames
            finger = None
            if stack is not None:
                p = _cal.finger_presence(stack.frames)
                if p.n_present >= 2:
                    finger = stack.frames[p.present]
            if stack is not None and blanks.shape[1:] != stack.frames.shape[1:]:
                raise _BadInput(f"--blank frames are {blanks.shape[1:]} plates; the input's "
                                f"are {stack.frames.shape[1:]}")
            cal = _cal.estimate_calibration(blanks, reference_frames=ref, frames=finger,
                                            notes={"blank_source": str(args.blank)})
        else:
            cal = _cal.calibrate_from_frames(stack.frames, n_blank=args.blank_frames,
                                             reference_frames=ref)
    except _cal.CalibrationError as exc:
        raise _Failure(str(exc)) from None
    cal.save(args.output, overwrite=args.force)
    s = cal.summary()
    s["output"] = str(args.output)
    out.document(s)
    c = s["bad_counts"]
    out.text(f"calibration  {args.output}: {s['shape'][0]} x {s['shape'][1]} plates from "
             f"{s['n_blank_frames']} blank frame(s) ({s['notes'].get('blank_source', '')})")
    out.text(f"offset       median {s['offset_median']:.2f} codes, spread {s['offset_spread']:.2f}")
    out.text("gain         " + (f"spread {s['gain_spread']:.4f} from {s['n_reference_frames']} "
                                "reference frame(s)" if s["n_reference_frames"] else
                                "not estimated (no --reference)"))
    noise = s["noise_median"]
    out.text(f"noise        {'unknown' if noise is None else format(noise, '.3f')} codes rms "
             f"(offset standard error {'unknown' if noise is None else format(noise / np.sqrt(s['n_blank_frames']), '.3f')})")
    out.text(f"bad plates   " + ", ".join(f"{k} {v}" for k, v in c.items())
             + f"; columns {s['bad_columns'] or 'none'}")
    return EXIT_OK


# ----------------------------------------------------------------------------------------------
# stitch
# ----------------------------------------------------------------------------------------------

def _cmd_stitch(args, out):
    _check_outputs([args.output, args.report, args.trajectory], args.force,
                   inputs=_inputs_of(args.input, args.calibration, manifest=args.manifest))
    suffix = Path(args.output).suffix.lower()
    if suffix not in (".tif", ".tiff", ".png"):
        raise _BadInput(f"-o/--output must end in .tif, .tiff or .png; got {args.output!r}")
    if not 0 <= args.low_percentile < args.high_percentile <= 100:
        raise _BadInput(f"--low-percentile and --high-percentile must satisfy 0 <= low < high "
                        f"<= 100; got {args.low_percentile} and {args.high_percentile}")
    stack = _read_stack(args.input, args)
    if stack.pitch_um is None:
        out.note("pitch unknown: assuming 50.8 um (500 ppi); set --pitch-um")
        stack = _io.FrameStack(frames=stack.frames, pitch_um=50.8,
                               frame_rate_hz=stack.frame_rate_hz, timestamps_s=stack.timestamps_s,
                               counters=stack.counters, dropped_after=stack.dropped_after,
                               dropped_count=stack.dropped_count, source=stack.source,
                               kind=stack.kind, manifest=stack.manifest, notes=stack.notes)
    if stack.n_dropped:
        out.note(f"{stack.n_dropped} dropped frame(s) in {len(stack.dropped_table())} gap(s); "
                 "the timestamps tell the motion estimator")
    cal = _load_calibration(args, stack, out)
    first = 0
    if args.trim:
        presence = _cal.finger_presence(stack.frames, calibration=cal)
        if not presence.any:
            raise _Failure("no finger in any frame (nothing to trim to)")
        first, last = presence.span()
        if last - first + 1 < 2:
            raise _Failure(f"the finger is present in one frame only ({first})")
        sl = slice(first, last + 1)
        stack = _io.FrameStack(
            frames=stack.frames[sl], pitch_um=stack.pitch_um, frame_rate_hz=stack.frame_rate_hz,
            timestamps_s=None if stack.timestamps_s is None else stack.timestamps_s[sl],
            counters=None if stack.counters is None else stack.counters[sl],
            source=stack.source, kind=stack.kind, manifest=stack.manifest, notes=stack.notes)
        out.note(f"trimmed to frames {first}..{last} (finger present)")
    result = _stitch(stack, args, cal)
    meta = _io.write_image(args.output, result.image, pitch_um=result.pitch_um, bits=args.bits,
                           percentiles=(args.low_percentile, args.high_percentile),
                           background=args.background, overwrite=args.force,
                           metadata={"input": stack.source, "verdict": result.report.verdict})
    doc = _report_document(result, stack, cal, meta)
    doc["first_frame"] = first
    if args.report:
        _io.write_json(args.report, doc, overwrite=args.force)
    if args.trajectory:
        _io.write_trajectory_csv(args.trajectory, result, timestamps_s=stack.timestamps_s,
                                 first_frame=first, overwrite=args.force)
    rep = result.report
    h_mm, w_mm = _image_extent_mm(result)
    summary = {"output": str(args.output), "verdict": rep.verdict, "reasons": list(rep.reasons),
               "image_px": list(result.image.shape), "image_mm": [h_mm, w_mm],
               "swipe_length_mm": rep.swipe_length_mm, "frames_in_contact": list(rep.frames_in_contact),
               "counts": dict(rep.counts), "report": args.report, "trajectory": args.trajectory}
    out.document(summary)
    out.text(f"image        {args.output}: {result.image.shape[0]} x {result.image.shape[1]} px "
             f"({h_mm:.2f} x {w_mm:.2f} mm at {np.asarray(result.pitch_um).ravel()[0]:.2f} um), "
             f"{args.bits}-bit")
    out.text(f"swipe        {rep.swipe_length_mm:.2f} mm in frames {rep.frames_in_contact[0]}.."
             f"{rep.frames_in_contact[1]}; events: "
             + (", ".join(f"{k} {v}" for k, v in rep.counts.items() if v) or "none"))
    out.text(f"verdict      {rep.verdict}" + (f" ({'; '.join(rep.reasons)})" if rep.reasons else ""))
    if args.report:
        out.text(f"report       {args.report}")
    if args.trajectory:
        out.text(f"trajectory   {args.trajectory}")
    if not rep.usable:
        out.note(f"the swipe is unusable: {'; '.join(rep.reasons) or 'see the report'}")
        return EXIT_FAILED
    return EXIT_OK


# ----------------------------------------------------------------------------------------------
# simulate
# ----------------------------------------------------------------------------------------------

_SIM_OPTIONS = ("pattern", "profile", "n_rows", "n_cols", "frame_rate_hz", "speed_mm_s", "snr_db",
                "skew_deg", "rotation_deg", "length_mm", "finger_size_mm", "stalls",
                "backtracks", "too_fast")


def _load_config(path):
    p = Path(path)
    raw = p.read_bytes()
    try:
        if p.suffix.lower() == ".toml":
            import tomllib
            cfg = tomllib.loads(raw.decode("utf-8"))
        else:
            cfg = json.loads(raw.decode("utf-8"))
    except Exception as exc:            # tomllib/json raise their own error kinds
        raise _BadInput(f"--config {str(path)!r} is not valid {'TOML' if p.suffix.lower() == '.toml' else 'JSON'}: {exc}") from None
    if not isinstance(cfg, dict):
        raise _BadInput(f"--config {str(path)!r} must hold a table/object of swipe options")
    if "swipe" in cfg and isinstance(cfg["swipe"], dict) and len(cfg) == 1:
        cfg = cfg["swipe"]
    return cfg


def _swipe_kwargs(args):
    from . import simulate
    swipe = getattr(simulate, "swipe", None)
    if swipe is None:
        raise _Failure("the simulator (stripstitch.simulate.swipe) is not available in this "
                       "installation")
    allowed = set(_inspect.signature(swipe).parameters) - {"pattern"} | {"pattern"}
    kw = {}
    if args.config:
        cfg = _load_config(args.config)
        unknown = sorted(set(cfg) - allowed)
        if unknown:
            raise _BadInput(f"--config {args.config!r} has unknown option(s) {unknown}; allowed: "
                            f"{sorted(allowed)}")
        for k, v in cfg.items():
            kw[k] = tuple(tuple(x) if isinstance(x, list) else x for x in v) if isinstance(v, list) else v
    for name in _SIM_OPTIONS:
        v = getattr(args, name, None)
        if v is not None:
            kw[name] = v
    if args.seed is not None:
        kw["rng"] = args.seed
    kw.setdefault("rng", 0)
    return swipe, kw


def _write_capture_npz(capture, path, force):
    path = Path(path)
    fd, tmp = tempfile.mkstemp(prefix=f".{path.stem}.", suffix=".npz", dir=path.parent or ".")
    os.close(fd)
    try:
        capture.to_npz(tmp)
        if path.exists() and not force:
            raise _BadInput(f"output {str(path)!r} exists already; pass --force to replace it")
        os.replace(tmp, path)
    finally:
        if os.path.exists(tmp):
            os.unlink(tmp)


def _cmd_simulate(args, out):
    out_path = Path(args.output)
    is_npz = out_path.suffix.lower() == ".npz"
    targets = [out_path] if is_npz else [out_path, out_path.with_suffix(".json")]
    if out_path.suffix.lower() == ".json":
        raise _BadInput("-o/--output must be an .npz capture or a dump file (e.g. .bin); the "
                        "manifest .json is written beside a dump")
    _check_outputs(targets + ([args.truth] if args.truth else []), args.force)
    swipe, kw = _swipe_kwargs(args)
    try:
        capture = swipe(**kw)
    except (TypeError, ValueError) as exc:
        raise _BadInput(f"swipe options: {exc}") from None
    if is_npz:
        _write_capture_npz(capture, out_path, args.force)
    else:
        notes = {"source": "stripstitch simulate", "options": _io._plain(
            {k: v for k, v in kw.items() if k != "rng"}), "seed": kw.get("rng")}
        _io.write_dump(out_path, capture.frames, frame_rate_hz=capture.frame_rate_hz,
                       timestamps_s=capture.times_s, pitch_um=capture.pitch_um,
                       container_bits=args.container_bits, value_bits=args.value_bits,
                       byte_order=args.byte_order, alignment=args.alignment, order=args.order,
                       transpose=args.transpose, flip_along=args.flip_along,
                       flip_across=args.flip_across, frame_header_bytes=args.header_bytes,
                       notes=notes, overwrite=args.force)
    if args.truth:
        _write_capture_npz(capture, args.truth, args.force)
    t, r, c = capture.frames.shape
    doc = {"output": str(out_path), "truth": args.truth, "n_frames": t, "rows": r, "columns": c,
           "frame_rate_hz": capture.frame_rate_hz, "pitch_um": capture.pitch_um,
           "snr_db": float(capture.snr_db), "events": [e.to_dict() for e in capture.events],
           "options": _io._plain({k: v for k, v in kw.items()})}
    out.document(doc)
    out.text(f"simulated    {t} frames of {r} x {c} at {capture.frame_rate_hz:.0f} Hz, "
             f"SNR {float(capture.snr_db):.1f} dB -> {out_path}"
             + ("" if is_npz else f" + {out_path.with_suffix('.json')}"))
    kinds = sorted({e.kind for e in capture.events})
    out.text(f"truth events {', '.join(kinds) or 'none'}")
    return EXIT_OK


# ----------------------------------------------------------------------------------------------
# evaluate
# ----------------------------------------------------------------------------------------------

def _read_capture(path):
    from . import simulate
    cls = getattr(simulate, "Capture", None)
    if cls is None or not hasattr(cls, "from_npz"):
        raise _Failure("the simulator's Capture is not available in this installation")
    try:
        return cls.from_npz(path)
    except FileNotFoundError:
        raise
    except (KeyError, ValueError, TypeError, OSError) as exc:
        raise _BadInput(f"{str(path)!r} is not a simulator capture (.npz written by "
                        f"'stripstitch simulate'): {exc}") from None


def _read_trajectory_csv(path, n_frames):
    import csv
    with open(path, newline="") as fh:
        rows = list(csv.DictReader(fh))
    need = ("frame", "along_px", "across_px")
    if not rows or any(k not in rows[0] for k in need):
        raise _BadInput(f"--trajectory {str(path)!r} must be a CSV with columns {list(need)} "
                        "(as written by 'stripstitch stitch --trajectory')")
    try:
        frame = np.array([int(r["frame"]) for r in rows])
        pos = np.array([[float(r["along_px"]), float(r["across_px"])] for r in rows])
        ang = np.array([float(r.get("angle_deg") or 0.0) for r in rows])
    except ValueError as exc:
        raise _BadInput(f"--trajectory {str(path)!r}: {exc}") from None
    if frame.min() < 0 or frame.max() >= n_frames:
        raise _BadInput(f"--trajectory {str(path)!r} lists frames {frame.min()}..{frame.max()}; "
                        f"the capture has {n_frames}")
    full_p = np.full((n_frames, 2), np.nan)
    full_a = np.full(n_frames, np.nan)
    full_p[frame] = pos
    full_a[frame] = ang
    return full_p, full_a


def _cmd_evaluate(args, out):
    _check_outputs([args.report], args.force,
                   inputs=_inputs_of(args.capture, args.trajectory, args.calibration))
    capture = _read_capture(args.capture)
    try:
        from . import evaluate as ev
    except ImportError:
        ev = None
    true_p = np.asarray(capture.positions, float)
    true_a = np.asarray(capture.angles, float)
    if args.trajectory:
        pos, ang = _read_trajectory_csv(args.trajectory, true_p.shape[0])
        result = None
    else:
        stack = _io.FrameStack(frames=capture.frames, pitch_um=capture.pitch_um,
                               frame_rate_hz=capture.frame_rate_hz, timestamps_s=capture.times_s,
                               source=str(args.capture), kind="capture")
        cal = _load_calibration(args, stack, out)
        result = _stitch(stack, args, cal)
        pos, ang = np.asarray(result.positions), np.asarray(result.angles)
    contact = np.asarray(getattr(capture, "contact", np.ones(true_p.shape[0])), float)
    scored = contact >= args.min_contact
    if ev is not None and result is not None and hasattr(ev, "evaluate"):
        metrics = ev.evaluate(result, capture, min_contact=args.min_contact).to_dict()
        how = "stripstitch.evaluate.evaluate"
    else:
        if ev is not None and hasattr(ev, "trajectory_errors"):
            ok = scored & np.isfinite(pos).all(axis=1)
            ref = int(np.flatnonzero(ok)[0]) if ok.any() else 0
            metrics = ev.trajectory_errors(pos, ang, true_p, true_a, frames=ok,
                                           reference_frame=ref).to_dict()
            how = "stripstitch.evaluate.trajectory_errors"
        else:
            ok = scored & np.isfinite(pos).all(axis=1)
            err = pos[ok] - true_p[ok]
            metrics = {"along_rms_px": float(np.sqrt(np.mean(err[:, 0] ** 2))),
                       "across_rms_px": float(np.sqrt(np.mean(err[:, 1] ** 2))),
                       "n_scored": int(ok.sum())}
            how = "trajectory RMS"
    doc = {"capture": str(args.capture), "trajectory": args.trajectory, "method": how,
           "metrics": metrics}
    if args.report:
        _io.write_json(args.report, doc, overwrite=args.force)
    out.document(doc)
    out.text(f"evaluated    {args.capture} ({how})")
    keys = ("along_rms_px", "across_rms_px", "along_max_px", "span_error_pct", "rotation_rms_deg",
            "ncc", "ssim", "distortion_rms_px", "n_scored")
    for k in keys:
        if k in metrics and metrics[k] is not None:
            v = metrics[k]
            out.text(f"  {k:<18} {v:.4f}" if isinstance(v, float) else f"  {k:<18} {v}")
    return EXIT_OK


# ----------------------------------------------------------------------------------------------
# compare
# ----------------------------------------------------------------------------------------------

def _read_image_2d(path, what, background):
    """A 2-D image from .npy (NaN = no data), .tif/.tiff or .png (``background`` code = no
    data) as float64."""
    p = Path(path)
    if not p.is_file():
        raise _BadInput(f"{what} {str(path)!r} not found")
    suffix = p.suffix.lower()
    try:
        if suffix == ".npy":
            img = np.load(p, allow_pickle=False)
            codes = None
        elif suffix in (".tif", ".tiff"):
            import tifffile
            img = codes = tifffile.imread(p)
        elif suffix == ".png":
            import cv2
            img = codes = cv2.imread(str(p), cv2.IMREAD_UNCHANGED)
            if img is None:
                raise ValueError("not a readable PNG")
        else:
            raise _BadInput(f"{what} {str(path)!r}: expected .npy, .tif, .tiff or .png; got "
                            f"{suffix or 'no suffix'!r}")
    except (OSError, ValueError) as exc:
        raise _BadInput(f"{what} {str(path)!r}: {exc}") from None
    img = np.asarray(img)
    if img.ndim != 2 or img.dtype.kind not in "uif":
        raise _BadInput(f"{what} {str(path)!r} must be one 2-D grey image; got shape "
                        f"{img.shape}, dtype {img.dtype}")
    out = img.astype(np.float64)
    if codes is not None and background is not None:
        out[codes == background] = np.nan
    return out


def _cmd_compare(args, out):
    from . import compare as _cmp
    _check_outputs([args.report, args.plot], args.force,
                   inputs=_inputs_of(args.image, args.reference, args.frames))
    img = _read_image_2d(args.image, "image", args.background)
    ref_pitch = args.reference_pitch_um
    if args.frames:
        stack = _read_stack(args.frames, args)
        res = _stitch(stack, args, None)
        ref = np.asarray(res.image)
        ref_pitch = float(res.pitch_um[0]) if ref_pitch is None else ref_pitch
        source = {"frames": str(args.frames), "stitched": True}
    else:
        ref = _read_image_2d(args.reference, "--reference", args.background)
        source = {"reference": str(args.reference)}
    img_pitch = args.image_pitch_um if args.image_pitch_um is not None else ref_pitch
    try:
        cmp = _cmp.compare(img, ref, image_pitch_um=img_pitch, reference_pitch_um=ref_pitch,
                           block_px=args.block_px, search_rows=args.search_rows)
    except ValueError as exc:
        if "does not match" in str(exc):
            raise _Failure(str(exc)) from None
        raise
    doc = {"software": f"stripstitch {__version__}", "image": str(args.image), **source,
           "comparison": cmp.to_dict(arrays=bool(args.arrays))}
    if args.report:
        _io.write_json(args.report, doc, overwrite=args.force)
    if args.plot:
        import matplotlib
        matplotlib.use("Agg")
        import matplotlib.pyplot as plt
        fig = _cmp.plot_distortion(cmp)
        with _io.atomic_output(args.plot, overwrite=args.force) as fh:
            fig.savefig(fh, format="png", dpi=120)
        plt.close(fig)
    out.document(doc)
    out.text(f"compared     {args.image} with {args.frames or args.reference}")
    for k in ("scale_along_pct", "shear_deg", "missing_rows", "duplicated_rows",
              "distortion_rms_px", "ncc", "ssim", "matched_fraction"):
        v = getattr(cmp, k)
        out.text(f"  {k:<18} {v:.4f}" if isinstance(v, float) else f"  {k:<18} {v}")
    return EXIT_OK


# ----------------------------------------------------------------------------------------------
# demo
# ----------------------------------------------------------------------------------------------

def find_demo_data():
    """Folder holding the bundled demo swipes: ``demo_data/`` of a source checkout (next to the
    package), or ``stripstitch/demo_data`` when shipped as package data. None if absent."""
    here = Path(__file__).resolve().parent
    for cand in (here / "demo_data", here.parent / "demo_data"):
        if cand.is_dir() and any(cand.glob("*.npz")):
            return cand
    return None


def _cmd_demo(args, out):
    folder = Path(args.data) if args.data else find_demo_data()
    if folder is None or not folder.is_dir():
        raise _Failure("no demo data found (looked for demo_data/ beside the package); pass "
                       "--data FOLDER")
    files = sorted(folder.glob("*.npz"))
    if not files:
        raise _Failure(f"no .npz swipes in {str(folder)!r}")
    outdir = Path(args.output)
    outdir.mkdir(parents=True, exist_ok=True)
    planned = []
    for f in files:
        planned += [outdir / f"{f.stem}{s}" for s in (".png", ".tiff", ".report.json",
                                                        ".trajectory.csv")]
    _check_outputs(planned, args.force)
    try:
        from .evaluate import trajectory_errors
    except ImportError:
        trajectory_errors = None
    rows = []
    for i, f in enumerate(files):
        out.progress(i, len(files), f.name)
        stack = _io.read_frames(f)
        if stack.pitch_um is None:
            stack = _io.FrameStack(frames=stack.frames, pitch_um=50.8,
                                   frame_rate_hz=stack.frame_rate_hz,
                                   timestamps_s=stack.timestamps_s, source=stack.source,
                                   kind=stack.kind)
        result = _stitch(stack, args, None)
        meta_png = _io.write_image(outdir / f"{f.stem}.png", result.image, pitch_um=result.pitch_um,
                                   bits=8, overwrite=args.force)
        _io.write_image(outdir / f"{f.stem}.tiff", result.image, pitch_um=result.pitch_um,
                        bits=16, overwrite=args.force)
        _io.write_json(outdir / f"{f.stem}.report.json",
                       _report_document(result, stack, None, meta_png), overwrite=args.force)
        _io.write_trajectory_csv(outdir / f"{f.stem}.trajectory.csv", result,
                                 timestamps_s=stack.timestamps_s, overwrite=args.force)
        rep = result.report
        row = {"swipe": f.stem, "frames": stack.n_frames,
               "sensor": f"{stack.frames.shape[1]}x{stack.frames.shape[2]}",
               "rate_hz": stack.frame_rate_hz, "verdict": rep.verdict,
               "length_mm": rep.swipe_length_mm,
               "events": ", ".join(f"{k} {v}" for k, v in rep.counts.items() if v) or "-",
               "along_rms_px": None}
        if stack.kind == "capture" and trajectory_errors is not None:
            try:
                capture = _read_capture(f)
                contact = np.asarray(capture.contact, float) >= 0.5
                ok = contact & np.isfinite(result.positions).all(axis=1)
                if ok.any():
                    ref = int(np.flatnonzero(ok)[0])
                    te = trajectory_errors(result.positions, result.angles, capture.positions,
                                           capture.angles, frames=ok, reference_frame=ref)
                    row["along_rms_px"] = te.along_rms_px
            except (_Failure, _BadInput, ValueError, KeyError):
                pass
        rows.append(row)
    out.progress(len(files), len(files), "done")
    out.document({"output": str(outdir), "swipes": rows})
    out.text(f"demo         {len(rows)} swipe(s) from {folder} -> {outdir}/")
    wn = max([5] + [len(r["swipe"]) for r in rows])
    head = f"{'swipe':<{wn}} {'frames':>6} {'sensor':>7} {'rate Hz':>8} {'verdict':>9} " \
           f"{'length mm':>9} {'RMS px':>7}  events"
    out.text(head)
    out.text("-" * len(head))
    for r in rows:
        rms = "-" if r["along_rms_px"] is None else f"{r['along_rms_px']:.3f}"
        rate = "-" if r["rate_hz"] is None else f"{r['rate_hz']:.0f}"
        out.text(f"{r['swipe']:<{wn}} {r['frames']:>6} {r['sensor']:>7} {rate:>8} "
                 f"{r['verdict']:>9} {r['length_mm']:>9.2f} {rms:>7}  {r['events']}")
    out.text("(RMS px: along-swipe position error against the simulator's truth; images are "
             "synthetic prints, test data only)")
    return EXIT_OK


# ----------------------------------------------------------------------------------------------
# parser
# ----------------------------------------------------------------------------------------------

def _epilog(examples):
    return "example:\n" + textwrap.indent(textwrap.dedent(examples).strip("\n"), "  ") + \
        "\n\n" + EXIT_CODES_HELP


def build_parser():
    """The argument parser (for documentation tools and tests)."""
    common = argparse.ArgumentParser(add_help=False)
    common.add_argument("-q", "--quiet", action="store_true",
                        help="print nothing but errors (and no privacy caution)")
    common.add_argument("--json", action="store_true",
                        help="print one JSON document on stdout instead of text")
    common.add_argument("--debug", action="store_true", help="show tracebacks of failures")
    reading = argparse.ArgumentParser(add_help=False)
    reading.add_argument("--manifest", metavar="JSON",
                         help="manifest of a raw dump (default: the .json beside the dump)")
    reading.add_argument("--pitch-um", type=_positive("--pitch-um"), metavar="UM",
                         help="plate pitch in um (overrides the file; default from the file, "
                              "else 50.8)")
    reading.add_argument("--frame-rate-hz", type=_positive("--frame-rate-hz"), metavar="HZ",
                         help="nominal frame rate (overrides the file)")
    writing = argparse.ArgumentParser(add_help=False)
    writing.add_argument("--force", action="store_true", help="replace existing output files")
    calib = argparse.ArgumentParser(add_help=False)
    g = calib.add_mutually_exclusive_group()
    g.add_argument("--calibration", metavar="NPZ", help="calibration from 'stripstitch calibrate'")
    g.add_argument("--auto-calibrate", action="store_true",
                   help="calibrate from the swipe's own finger-absent frames (or --blank-frames)")
    calib.add_argument("--blank-frames", type=_count("--blank-frames"), metavar="N",
                       help="with --auto-calibrate: the first N frames are blanks")
    stitching = argparse.ArgumentParser(add_help=False)
    stitching.add_argument("--mode", choices=("default", "fast"), default="default",
                           help="reconstruction mode (default: %(default)s)")

    p = _Parser(prog="stripstitch", formatter_class=argparse.RawDescriptionHelpFormatter,
                description="Stitch swipe-sensor frames into a geometrically true 500 ppi "
                            "fingerprint image; inspect and calibrate raw dumps; simulate "
                            "swipes with ground truth.",
                epilog=_epilog("""
                    stripstitch demo -o demo-out
                    stripstitch inspect swipe.bin
                    stripstitch calibrate swipe.bin -o sensor.cal.npz
                    stripstitch stitch swipe.bin --calibration sensor.cal.npz -o swipe.tiff \\
                        --report swipe.json --trajectory swipe.csv
                    """) + "\nFingerprint images are biometric personal data: handle them under "
                           "your local privacy law.\nstripstitch never sends data anywhere.")
    p.add_argument("--version", action="version", version=f"stripstitch {__version__}")
    sub = p.add_subparsers(dest="command", metavar="COMMAND", parser_class=_Parser)
    sub.required = True
    fmt = argparse.RawDescriptionHelpFormatter

    s = sub.add_parser("inspect", parents=[common, reading], formatter_class=fmt,
                       help="geometry, timing, finger span, noise, contrast, bad plates, drops",
                       description="Describe a frame stack or dump: geometry, frame count and "
                                   "duration, where the finger is present, noise and contrast, "
                                   "dead/stuck/noisy plates, dropped frames.",
                       epilog=_epilog("""
                           stripstitch inspect swipe.bin            # dump + swipe.json beside it
                           stripstitch inspect swipe.npy --frame-rate-hz 4000 --json
                           """))
    s.add_argument("input", help=".npy, .npz, a dump, or its .json manifest")
    s.add_argument("--calibration", metavar="NPZ", help="use this calibration for the figures")
    s.set_defaults(func=_cmd_inspect)

    s = sub.add_parser("calibrate", parents=[common, reading, writing], formatter_class=fmt,
                       help="per-plate offset/gain and bad plates from finger-absent frames",
                       description="Estimate the fixed-pattern offset (mean of finger-absent "
                                   "frames), the gain (with --reference: frames of a uniform "
                                   "second level) and the dead/stuck/noisy/weak plates; save as "
                                   ".npz with a JSON header.",
                       epilog=_epilog("""
                           stripstitch calibrate swipe.bin -o sensor.cal.npz        # blanks inferred
                           stripstitch calibrate swipe.bin --blank-frames 40 -o sensor.cal.npz
                           stripstitch calibrate --blank blank.npy --reference flat.npy -o sensor.cal.npz
                           """))
    s.add_argument("input", nargs="?", help="a swipe (blanks inferred from empty frames, or "
                                            "its first --blank-frames frames)")
    s.add_argument("-o", "--output", required=True, metavar="NPZ", help="calibration file to write")
    s.add_argument("--blank", metavar="FILE", help="separate finger-absent capture")
    s.add_argument("--blank-frames", type=_count("--blank-frames"), metavar="N",
                   help="the input's first N frames are finger-absent")
    s.add_argument("--reference", metavar="FILE",
                   help="frames of a uniform second level (flat conductor) for the gain")
    s.set_defaults(func=_cmd_calibrate)

    s = sub.add_parser("stitch", parents=[common, reading, writing, calib, stitching],
                       formatter_class=fmt, help="reconstruct the image (TIFF/PNG at the true pitch)",
                       description="Reconstruct one geometrically true image from a swipe and "
                                   "write it as TIFF or PNG with its physical pixel size; "
                                   "optionally the quality report (JSON) and trajectory (CSV).",
                       epilog=_epilog("""
                           stripstitch stitch swipe.npy -o swipe.tiff
                           stripstitch stitch swipe.bin --auto-calibrate -o swipe.png --bits 8 \\
                               --report swipe.report.json --trajectory swipe.trajectory.csv
                           """) + "\nImage scaling: the 0.5th..99.5th percentiles of the image "
                                  "map to codes 1..max; no-data pixels get --background;\nthe "
                                  "scaling is stated in the file (TIFF ImageDescription / PNG "
                                  "tEXt, JSON).")
    s.add_argument("input", help=".npy, .npz (frames key, or a simulator capture), a dump, or "
                                 "its .json manifest")
    s.add_argument("-o", "--output", required=True, metavar="IMAGE", help=".tif/.tiff or .png")
    s.add_argument("--report", metavar="JSON", help="also write the quality report")
    s.add_argument("--trajectory", metavar="CSV", help="also write the per-frame trajectory")
    s.add_argument("--bits", type=int, choices=(8, 16), default=8,
                   help="image depth (default: %(default)s, the 8-bit grey of fingerprint "
                        "image standards)")
    s.add_argument("--low-percentile", type=float, default=0.5, metavar="P",
                   help="percentile mapped to the lowest data code (default: %(default)s)")
    s.add_argument("--high-percentile", type=float, default=99.5, metavar="P",
                   help="percentile mapped to the top code (default: %(default)s)")
    s.add_argument("--background", type=_count("--background", lo=0), default=0, metavar="CODE",
                   help="code for pixels without data (default: %(default)s)")
    s.add_argument("--output-pitch-um", type=_positive("--output-pitch-um"), metavar="UM",
                   help="output pixel pitch (default: the sensor pitch)")
    s.add_argument("--trim", action="store_true",
                   help="stitch only the frames from the finger's arrival to its lift-off "
                        "(trajectory frame numbers stay those of the input; positions are "
                        "relative to the first kept frame)")
    s.set_defaults(func=_cmd_stitch)

    s = sub.add_parser("simulate", parents=[common, writing], formatter_class=fmt,
                       help="simulate a swipe with ground truth (.npz, or dump + manifest)",
                       description="Simulate a swipe over a capacitive strip sensor. Options "
                                   "come from --config (JSON or TOML: keys are the arguments "
                                   "of stripstitch.simulate.swipe) and the flags below (flags "
                                   "win). An .npz output is a capture with all truth; any other "
                                   "suffix writes a raw dump + .json manifest in the layout "
                                   "given by the dump options.",
                       epilog=_epilog("""
                           stripstitch simulate -o swipe.npz --pattern whorl --speed-mm-s 150 --seed 3
                           stripstitch simulate -o swipe.bin --truth swipe.npz --container-bits 16 \\
                               --value-bits 12 --byte-order big --header-bytes 16 --flip-across
                           stripstitch simulate -o swipe.npz --config slanted.toml
                           """))
    s.add_argument("-o", "--output", required=True, metavar="FILE", help=".npz or a dump (.bin)")
    s.add_argument("--config", metavar="FILE", help="JSON or TOML file of swipe options")
    s.add_argument("--truth", metavar="NPZ", help="with a dump output: also write the capture")
    s.add_argument("--seed", type=int, help="random seed (default: 0)")
    s.add_argument("--pattern", help="finger pattern class (e.g. right_loop, whorl, arch)")
    s.add_argument("--profile", help="speed profile (constant, accel_decel, human)")
    s.add_argument("--rows", dest="n_rows", type=_count("--rows", lo=2), metavar="R")
    s.add_argument("--cols", dest="n_cols", type=_count("--cols", lo=2), metavar="C")
    s.add_argument("--frame-rate-hz", type=_positive("--frame-rate-hz"), metavar="HZ")
    s.add_argument("--speed-mm-s", type=_positive("--speed-mm-s"), metavar="MM_S")
    s.add_argument("--snr-db", type=float, metavar="DB")
    s.add_argument("--skew-deg", type=float, metavar="DEG")
    s.add_argument("--rotation-deg", type=float, metavar="DEG")
    s.add_argument("--length-mm", type=_positive("--length-mm"), metavar="MM")
    d = s.add_argument_group("dump layout (outputs other than .npz)")
    d.add_argument("--container-bits", type=int, choices=(8, 16),
                   help="bits per stored sample (default: 8 if the codes fit)")
    d.add_argument("--value-bits", type=_count("--value-bits"), metavar="BITS",
                   help="significant bits per sample (default: the container's)")
    d.add_argument("--byte-order", choices=("little", "big"), default="little")
    d.add_argument("--alignment", choices=("low", "high"), default="low")
    d.add_argument("--order", choices=("row_major", "column_major"), default="row_major")
    d.add_argument("--header-bytes", type=_count("--header-bytes", lo=0), default=0, metavar="N",
                   help="per-frame header (>= 4: counter; >= 12: counter + timestamp)")
    d.add_argument("--transpose", action="store_true")
    d.add_argument("--flip-along", action="store_true")
    d.add_argument("--flip-across", action="store_true")
    s.set_defaults(func=_cmd_simulate)

    s = sub.add_parser("evaluate", parents=[common, writing, calib, stitching], formatter_class=fmt,
                       help="score a reconstruction against a simulated capture's truth",
                       description="Stitch a simulated capture (or take a trajectory CSV from "
                                   "'stripstitch stitch --trajectory') and score it against the "
                                   "capture's truth.",
                       epilog=_epilog("""
                           stripstitch evaluate swipe.npz
                           stripstitch evaluate swipe.npz --trajectory swipe.trajectory.csv --json
                           """))
    s.add_argument("capture", help="capture .npz written by 'stripstitch simulate'")
    s.add_argument("--trajectory", metavar="CSV", help="score this trajectory instead of stitching")
    s.add_argument("--report", metavar="JSON", help="also write the metrics as JSON")
    s.add_argument("--min-contact", type=float, default=0.5, metavar="F",
                   help="score frames with at least this contact fraction (default: %(default)s)")
    s.set_defaults(func=_cmd_evaluate)

    s = sub.add_parser("compare", parents=[common, reading, writing, stitching],
                       formatter_class=fmt,
                       help="measure an image stitched elsewhere against a reference",
                       description="Align an image stitched elsewhere (e.g. on the device) "
                                   "with a reference image, or with the reference stitched "
                                   "from the swipe's frames, and report the along-swipe scale "
                                   "error, shear, missing and duplicated rows, local "
                                   "distortion (block matching), NCC and SSIM.",
                       epilog=_epilog("""
                           stripstitch compare device.png --frames swipe.npy --report cmp.json
                           stripstitch compare device.tiff --reference swipe.tiff \\
                               --plot distortion.png --json
                           """))
    s.add_argument("image", help="image under test: .npy (NaN = no data), .tif/.tiff or .png")
    g = s.add_mutually_exclusive_group(required=True)
    g.add_argument("--reference", metavar="IMAGE", help="reference image (.npy, .tif, .png)")
    g.add_argument("--frames", metavar="FILE",
                   help="the swipe's frames (as for 'stitch'): stitch the reference first")
    s.add_argument("--report", metavar="JSON", help="also write the comparison as JSON")
    s.add_argument("--plot", metavar="PNG", help="also draw the distortion field")
    s.add_argument("--arrays", action="store_true",
                   help="include the per-row and per-block arrays in the JSON")
    s.add_argument("--image-pitch-um", type=_positive("--image-pitch-um"), metavar="UM",
                   help="pixel pitch of the image (default: the reference's)")
    s.add_argument("--reference-pitch-um", type=_positive("--reference-pitch-um"), metavar="UM",
                   help="pixel pitch of the reference (default: from the stitch, else the "
                        "image's)")
    s.add_argument("--background", type=_count("--background", lo=0), default=0, metavar="CODE",
                   help="code of no-data pixels in TIFF/PNG inputs (default: %(default)s)")
    s.add_argument("--block-px", type=_count("--block-px", lo=8), default=32, metavar="N",
                   help="block size of the distortion field (default: %(default)s)")
    s.add_argument("--search-rows", type=_count("--search-rows", lo=1), default=12, metavar="N",
                   help="search range per row in pixels (default: %(default)s)")
    s.set_defaults(func=_cmd_compare)

    s = sub.add_parser("demo", parents=[common, writing, stitching], formatter_class=fmt,
                       help="stitch the bundled demo swipes and print a summary table",
                       description="Stitch the bundled demo swipes (synthetic prints, test data "
                                   "only) and write PNG, TIFF, report JSON and trajectory CSV "
                                   "for each into the output folder.",
                       epilog=_epilog("""
                           stripstitch demo -o demo-out
                           stripstitch demo -o demo-out --force --json
                           """))
    s.add_argument("-o", "--output", default="stripstitch-demo", metavar="FOLDER",
                   help="output folder (default: %(default)s)")
    s.add_argument("--data", metavar="FOLDER", help="folder of .npz swipes (default: bundled)")
    s.set_defaults(func=_cmd_demo)
    return p


def main(argv=None) -> int:
    """Run the ``stripstitch`` command; returns the exit code (0 ok, 1 failed, 2 bad input)."""
    parser = build_parser()
    try:
        args = parser.parse_args(argv)
    except SystemExit as exc:               # --help, --version, usage errors
        return int(exc.code) if isinstance(exc.code, int) else EXIT_USAGE
    out = _Out(args)
    if not out.quiet:
        print(CAUTION, file=sys.stderr)
    prog = f"stripstitch {args.command}"
    try:
        return int(args.func(args, out))
    except _Failure as exc:
        print(f"{prog}: failed: {exc}", file=sys.stderr)
        return EXIT_FAILED
    except ReconstructionError as exc:
        print(f"{prog}: failed: {exc}", file=sys.stderr)
        return EXIT_FAILED
    except (_BadInput, _io.FormatError, _cal.CalibrationError, FileNotFoundError,
            FileExistsError, IsADirectoryError, PermissionError, ValueError, TypeError) as exc:
        if getattr(args, "debug", False):
            raise
        msg = str(exc).replace("\n", " ")
        print(f"{prog}: error: {msg}", file=sys.stderr)
        return EXIT_USAGE
    except KeyboardInterrupt:
        print(f"{prog}: interrupted", file=sys.stderr)
        return 130
    except Exception as exc:   # noqa: BLE001 - one clean line, never a traceback (unless --debug)
        if getattr(args, "debug", False):
            raise
        print(f"{prog}: failed: {type(exc).__name__}: {exc}", file=sys.stderr)
        return EXIT_FAILED


if __name__ == "__main__":         # pragma: no cover
    sys.exit(main())
