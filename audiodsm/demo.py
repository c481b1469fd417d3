"""The shipped demo: grade, render and report the candidates of two invented products.

It grades the candidate profiles, renders the demo material through each candidate, writes
the reports and prints where everything went.

Run it as ``python -m audiodsm.demo`` (``make demo``) from a checkout. It reads

* ``profiles/dac_chip/*.toml`` and ``profiles/pocket_amp/*.toml``: the candidates of a demo
  DAC chip and a demo portable class-D speaker amplifier (both invented);
* ``profiles/specs/dac_chip.toml`` and ``profiles/specs/pocket_amp.toml``: their spec sheets
  (targets invented for the demo);
* ``audio_demo/*.wav``: short synthesized program material (made by
  ``audio_demo/make_demo_audio.py``; remade here when missing);

and writes into ``demo_out/`` (git-ignored): ``report/<product>/grades.{html,json,csv}``,
``listening/<product>/*.listen.wav`` (plus each render's summary JSON), for every candidate
with a ``[fixed_point]`` section its hardware handoff folder ``handoff/<product>/<profile>/``
(see docs/fixed_point.md), the battery cache ``cache/``, so a second run reuses the graded
batteries, and a listening set for the demo DAC
(``listening_set/dac_chip/listening.html``, its key beside it): the 5th-order single-bit
candidate with spread NTF zeros against the same loop with every zero at DC
(``profiles/variants/``), on short excerpts of two demo clips. A set whose key exists is kept
as it is (keys are never replaced).

After each product's grades it prints what the impairments cost (:func:`tradeoff_lines`):
the -1 dBFS THD+N of every candidate with mismatched unit elements, as built and with ideal
elements, with the spec's verdict (the demo DAC's thermometer part fails, its shaped part
passes), and every candidate's dynamic range with 1, 10 and 100 ps of clock jitter (the
single-bit streams against the 17-level ones).

To keep the whole demo within about three minutes on two cores, it runs the battery's short
plan (fewer levels and DC offsets, shorter captures) and says so in its output; ``audiodsm
grade`` runs the full battery.
"""

from __future__ import annotations

import argparse
import importlib.util
import os
import sys
import time
from pathlib import Path

__all__ = ["PRODUCTS", "LISTENING_PAIR", "run_demo", "tradeoff_lines", "main"]

#: product folder name -> (plain title, spec sheet file name)
PRODUCTS = {
    "dac_chip": ("demo DAC chip (invented)", "dac_chip.toml"),
    "pocket_amp": ("demo pocket speaker amplifier (invented)", "pocket_amp.toml"),
}

#: The demo's listening comparison: two profiles that differ in one choice (spread NTF zeros
#: against every zero at DC), paths relative to the checkout.
LISTENING_PAIR = (
    "profiles/dac_chip/pdm5_64x.toml",
    "profiles/variants/dac_chip_pdm5_64x_dc_zeros.toml",
)
#: Demo clips it uses (the quiet ones, where a noise floor can be heard), excerpt length (s)
#: and blind trials.
LISTENING_CLIPS = ("quiet_passage.wav", "fade_to_silence.wav")
LISTENING_EXCERPT_S = 2.0
LISTENING_TRIALS = 8


def _checkout() -> Path:
    """The checkout holding ``profiles/`` and ``audio_demo/`` (the package's parent folder)."""
    return Path(__file__).resolve().parent.parent


def _demo_clips(root: Path, say) -> list:
    folder = root / "audio_demo"
    clips = sorted(folder.glob("*.wav"))
    if clips:
        return clips
    say("demo audio missing; synthesizing it with audio_demo/make_demo_audio.py")
    spec = importlib.util.spec_from_file_location("_demo_audio", folder / "make_demo_audio.py")
    module = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(module)
    return sorted(module.write_clips(folder))


def _listening_set(root: Path, out: Path, clips, protect, say):
    """Write the demo DAC's listening set (or keep the one already there); its page path."""
    from audiodsm.evaluate.listening import PAGE_NAME, key_path_for, make_listening_set, set_table

    pair = [root / p for p in LISTENING_PAIR]
    if not all(p.is_file() for p in pair):
        say("listening set skipped: " + ", ".join(str(p) for p in pair if not p.is_file()))
        return None
    chosen = [c for c in clips if c.name in LISTENING_CLIPS] or list(clips[:1])
    folder = out / "listening_set" / "dac_chip"
    if key_path_for(folder).exists():
        say(f"listening set kept from an earlier run (its key is never replaced; remove {folder} "
            f"and {key_path_for(folder).name} beside it for a fresh one)")  # fmt: skip
        return folder / PAGE_NAME
    t0 = time.perf_counter()
    summary = make_listening_set(
        pair,
        chosen,
        folder,
        trials_per_pair=LISTENING_TRIALS,
        length_s=LISTENING_EXCERPT_S,
        replace=True,
        protect=protect,
    )
    say(f"\n== listening set, demo DAC: spread zeros against zeros at DC "
        f"({time.perf_counter() - t0:.1f} s) ==")  # fmt: skip
    for line in set_table(summary):
        say("  " + line)
    return Path(summary["page"])


def _fmt(value, digits=1):
    return "-" if value is None else f"{value:.{digits}f}"


def tradeoff_lines(batch) -> list:
    """Plain lines on what a product's impairments cost its candidates.

    Two views a designer weighs, from the graded batteries: the unit elements' mismatch (the
    -1 dBFS THD+N as built and with ideal elements, and the spec's verdict on it) for every
    candidate with mismatched elements, and the clock jitter (the dynamic range with 1, 10 and
    100 ps rms of white jitter on the output edges, and the rms output step the jitter noise
    goes with) for every candidate the jitter model covers. Empty when no candidate has
    either reading.
    """
    grades = sorted(batch.grades, key=lambda g: g.name)
    target = next((t for t in batch.spec.targets if t.metric == "thd_n_db_at_minus1_dbfs"), None)
    lines = []
    mismatched = [g for g in grades if g.metrics.get("mismatch_thd_n_cost_db") is not None]
    if mismatched:
        want = f" (target {target.requirement})" if target is not None else ""
        lines.append(f"unit-element mismatch: THD+N at -1 dBFS as built{want}")
        width = max(len(g.name) for g in mismatched)
        for g in mismatched:
            m = g.metrics
            got = m.get("thd_n_db_at_minus1_dbfs")
            verdict = ""
            if target is not None:
                line = next((x for x in g.lines if x.target == target), None)
                verdict = "  PASS" if line is not None and line.passed else "  FAIL"
            lines.append(
                f"  {g.name:<{width}}  {_fmt(got):>7} dB{verdict}  (ideal elements "
                f"{_fmt(m.get('mismatch_free_thd_n_db_at_minus1_dbfs'))} dB: the mismatch "
                f"costs {_fmt(m.get('mismatch_thd_n_cost_db'))} dB of THD+N and "
                f"{_fmt(m.get('mismatch_dynamic_range_cost_db'))} dB of dynamic range)"
            )
    jittered = [g for g in grades if g.metrics.get("jitter_dynamic_range_db_at_1ps") is not None]
    if jittered:
        if lines:
            lines.append("")
        lines.append(
            "clock jitter: dynamic range (dB, unweighted, -60 dBFS) with white jitter on the "
            "output edges"
        )
        width = max(len(g.name) for g in jittered)
        lines.append(f"  {'profile':<{width}}  as built     1 ps    10 ps   100 ps   rms step (FS)")
        for g in jittered:
            m = g.metrics
            cells = [m.get("dynamic_range_db")] + [
                m.get(f"jitter_dynamic_range_db_at_{s}ps") for s in (1, 10, 100)
            ]
            lines.append(
                f"  {g.name:<{width}}  "
                + "  ".join(f"{_fmt(v):>7}" for v in cells)
                + f"   {_fmt(m.get('output_step_rms_fs'), 3):>7}"
            )
        lines.append(
            "  (the jitter noise goes with the square of the rms step: a single-bit stream "
            "steps by the whole range, a 17-level one by a few levels)"
        )
    return lines


def _quick_plan():
    from audiodsm.evaluate.battery import BatteryPlan

    return BatteryPlan.quick()


def run_demo(
    root=None, out_dir=None, *, jobs=None, full_battery=False, battery=None, say=print
) -> dict:
    """Run the demo end to end.

    Parameters
    ----------
    root : path-like, optional
        The checkout (default: the one this module lives in).
    out_dir : path-like, optional
        Output folder (default: ``<root>/demo_out``).
    jobs : int, optional, keyword-only
        Cores to use (default: all).
    full_battery : bool, keyword-only
        Run the full battery instead of its short plan (slower than three minutes).
    battery : callable, optional, keyword-only
        The test battery (default: :func:`audiodsm.evaluate.battery.run_battery`); see
        :func:`audiodsm.evaluate.grade.grade_batch`.
    say : callable, keyword-only
        Where progress lines go.

    Returns
    -------
    dict
        ``{"reports": {product: {kind: path}}, "listening": [paths], "listening_page": path or
        None, "batches": {product: GradeBatch}, "handoffs": [folders], "seconds": float}``.
    """
    from audiodsm.evaluate.grade import collect_profiles, grade_batch
    from audiodsm.evaluate.render import HEARING_CAUTION, render_file
    from audiodsm.evaluate.report import write_report
    from audiodsm.hardware.handoff import write_handoff
    from audiodsm.spec import load_spec

    start = time.perf_counter()
    root = Path(root) if root is not None else _checkout()
    out = Path(out_dir) if out_dir is not None else root / "demo_out"
    out.mkdir(parents=True, exist_ok=True)
    options = {} if full_battery else {"plan": _quick_plan()}
    if not full_battery:
        say(
            "note: the demo runs the battery's short plan (fewer levels and DC offsets, "
            "shorter captures) to finish in about three minutes; `audiodsm grade` runs the "
            "full battery"
        )
    clips = _demo_clips(root, say)
    inputs = [*clips]
    reports, listening, batches, handoffs = {}, [], {}, []
    for product, (title, spec_name) in PRODUCTS.items():
        spec_path = root / "profiles" / "specs" / spec_name
        spec = load_spec(spec_path)
        profiles = collect_profiles([root / "profiles" / product])
        inputs += [spec_path, *(p for p, _ in profiles)]
        say(f"\n== {title}: {len(profiles)} candidate profiles against {spec_path.name} ==")
        t0 = time.perf_counter()
        batch = grade_batch(
            profiles,
            spec,
            battery=battery,
            jobs=jobs,
            cache_dir=out / "cache",
            battery_options=options,
            progress=None,
            say=say,  # with jobs > 1: the local cluster it runs on (and its dashboard)
        )
        batches[product] = batch
        say(f"graded in {time.perf_counter() - t0:.1f} s")
        from audiodsm.evaluate.tables import detail_table, summary_table

        for line in summary_table(batch):
            say("  " + line)
        say("")
        for line in detail_table(batch):
            say("  " + line)
        for g in batch.grades:
            if g.failure:
                say(f"  {g.name}: {g.failure}")
        costs = tradeoff_lines(batch)
        if costs:
            say(f"\n-- {title}: what the impairments cost --")
            for line in costs:
                say("  " + line if line else "")
        reports[product] = write_report(
            batch, out / "report" / product, protect=inputs, title=f"{title}: grades"
        )

        listen_dir = out / "listening" / product
        listen_dir.mkdir(parents=True, exist_ok=True)
        t0 = time.perf_counter()
        for _path, prof in profiles:
            for clip in clips:
                summary = render_file(clip, prof, listen_dir, overwrite=True, protect=inputs)
                listening.append(Path(summary["outputs"]["listening"]))
        say(f"rendered {len(clips)} clips x {len(profiles)} profiles in "
            f"{time.perf_counter() - t0:.1f} s")  # fmt: skip
        for path, prof in profiles:
            if prof.fixed_point.active:  # the loop handed to RTL: write its folder
                folder = out / "handoff" / product / Path(path).stem
                summary = write_handoff(prof, folder)
                handoffs.append(summary.folder)
                say(f"hardware handoff of {prof.name}: {len(summary.files)} files")

    listening_page = _listening_set(root, out, clips, inputs, say)

    seconds = time.perf_counter() - start
    say("\n== where everything went ==")
    for product, files in reports.items():
        say(f"report, {PRODUCTS[product][0]}: {files['html']}")
        say(f"   same grades as JSON and CSV: {files['json'].name}, {files['csv'].name}")
    say(f"listening files ({len(listening)}): {out / 'listening'}/<product>/")
    for folder in handoffs:
        say(f"hardware handoff (formats, coefficients, test vectors, Verilog): {folder}")
    if listening_page is not None:
        from audiodsm.evaluate.listening import key_path_for

        say(f"listening page (open comparison and {LISTENING_TRIALS} blind A/B/X trials), "
            f"demo DAC: {listening_page}")  # fmt: skip
        say(f"   its key, beside the set (open it only after the trials): "
            f"{key_path_for(listening_page.parent)}")  # fmt: skip
    say(f"battery cache (a second run reuses it): {out / 'cache'}")
    say(f"demo material: {root / 'audio_demo'}")
    say("")
    say(HEARING_CAUTION)
    say(f"demo finished in {seconds:.0f} s")
    return {
        "reports": reports,
        "listening": listening,
        "listening_page": listening_page,
        "batches": batches,
        "handoffs": handoffs,
        "seconds": seconds,
    }


def main(argv=None) -> int:
    """Command-line entry: ``python -m audiodsm.demo [--out DIR] [--jobs N] [--full]``."""
    parser = argparse.ArgumentParser(
        prog="python -m audiodsm.demo", description="Run the shipped audiodsm demo."
    )
    parser.add_argument("--out", default=None, help="output folder (default: demo_out/)")
    parser.add_argument("--jobs", type=int, default=None, help="cores to use (default: all)")
    parser.add_argument("--full", action="store_true", help="run the full battery (slower)")
    args = parser.parse_args(argv)
    from audiodsm.errors import AudiodsmError

    try:
        run_demo(out_dir=args.out, jobs=args.jobs or os.cpu_count(), full_battery=args.full)
    except AudiodsmError as exc:
        print(f"audiodsm demo: error: {exc}", file=sys.stderr)
        return 2
    except KeyboardInterrupt:
        print("audiodsm demo: interrupted; finished batteries are cached", file=sys.stderr)
        return 130
    return 0


if __name__ == "__main__":
    sys.exit(main())
