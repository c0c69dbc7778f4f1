"""The `trawl` command: thin commands over the library. Errors are one line, never a traceback."""

from __future__ import annotations

import functools
import json
import os
import sys
from pathlib import Path
from typing import List, Optional

import typer
from rich.console import Console
from rich.table import Table

from . import TrawlError

app = typer.Typer(
    help="Find where typed words are spoken in an archive of broadcasts, in any language.\n\n"
         "First index a folder of recordings once (trawl index), then search it for words as they are "
         "spelled (trawl search). Hits are candidates: listen before you rely on one.",
    pretty_exceptions_enable=False, no_args_is_help=True, add_completion=False)
rules_app = typer.Typer(help="Spelling rules stored in an index, applied to every search.", no_args_is_help=True)
app.add_typer(rules_app, name="rules")
def _piped_width(default: int = 160) -> int:
    """COLUMNS when it is a positive number (shells and CI runners may set it empty or odd)."""
    value = os.environ.get("COLUMNS", "").strip()
    return int(value) if value.isdigit() and int(value) > 0 else default


out = Console()
if not out.is_terminal:  # piped or captured: keep table rows on one line each
    out = Console(width=_piped_width())
err = Console(stderr=True)


INTERNAL_ERROR = 70  # EX_SOFTWARE of sysexits.h: a fault of Trawl's own (2 is typer's usage error)
WaitOpt = typer.Option(False, "--wait", help="If another command is writing the index, wait for it instead of refusing.")


def friendly(fn):
    """Run a command; turn errors into one line on stderr and a non-zero exit."""

    @functools.wraps(fn)
    def wrapper(*args, **kwargs):
        try:
            return fn(*args, **kwargs)
        except TrawlError as e:  # exit codes (README): 1 refused, 3 index damaged, 75 index busy
            err.print(f"[bold red]error:[/] {e}", highlight=False, soft_wrap=True)
            raise typer.Exit(getattr(e, "exit_code", 1))
        except KeyboardInterrupt:
            err.print("interrupted: finished broadcasts are kept; run the same command again to resume")
            raise typer.Exit(130)
        except (typer.Exit, typer.Abort):
            raise
        except Exception as e:  # never a traceback for the user (set TRAWL_DEBUG=1 to see one)
            if os.environ.get("TRAWL_DEBUG"):
                raise
            err.print(f"[bold red]error:[/] unexpected {type(e).__name__}: {str(e).splitlines()[0] if str(e) else ''}",
                      highlight=False, soft_wrap=True)
            raise typer.Exit(INTERNAL_ERROR)

    return wrapper


IndexOpt = typer.Option(..., "--index", "-i", help="The index folder (made by `trawl index`).")
ModelsOpt = typer.Option(None, "--models", help="Folder with the model files and card (default: the bundled models).",
                         envvar="TRAWL_MODELS")


# ----------------------------------------------------------------- index
@app.command("index")
@friendly
def index_cmd(
    archive: Path = typer.Argument(..., help="Folder of broadcasts; searched recursively for WAV, FLAC, MP3 and Ogg/Opus."),
    index: Path = typer.Option(..., "--index", "-i", help="Index folder to create or add to."),
    models: Optional[str] = ModelsOpt,
    as_json: bool = typer.Option(False, "--json", help="Print the summary as JSON (for programs) instead of a table."),
    wait: bool = WaitOpt,
    reindex: bool = typer.Option(False, "--reindex", help="The index was made with another model: index the archive "
                                 "again with the installed one, keeping the spelling rules and learned rules."),
):
    """Index a folder of broadcasts so its words can be searched.

    Files already indexed with the same content are skipped; changed files are indexed again;
    files gone from the folder are taken out of the index (a renamed file keeps its work).
    If a run is interrupted, the broadcasts that finished are kept: run the same command again
    to carry on; damaged index files are found and their broadcasts embedded again.
    Silence and music without speech are not indexed. Exits 1 if any file failed.
    """
    from rich.progress import BarColumn, Progress, TextColumn, TimeElapsedColumn

    from .index_store import Index
    from .indexing import find_audio, index_archive
    from .models import load

    if not find_audio(archive):  # check before any progress bar or index folder appears
        raise TrawlError(f"no audio files (WAV, FLAC, MP3, Ogg/Opus) under {archive}")
    if index.exists() and not index.is_dir():
        raise TrawlError(f"{index} is a file, not an index folder: choose an empty or new folder")
    previous = index.with_name(index.name + ".previous-model")  # an index being replaced (kept until the new one is done)
    if (index / "trawl-index.json").exists():
        manifest = Index.read_manifest(index)
        if reindex and manifest["model_card_sha256"] != load(models).card_hash:
            if previous.exists():
                raise TrawlError(f"{previous} is in the way: an earlier re-index left it; move it away first")
            os.replace(index, previous)
        else:
            Index.check_manifest(manifest, index, load(models))
    state = {"audio": 0.0}
    with Progress(TextColumn("[bold]{task.description}"), BarColumn(), TextColumn("{task.completed}/{task.total} files"),
                  TextColumn("{task.fields[hours]:.2f} h audio"), TextColumn("{task.fields[speed]}"),
                  TimeElapsedColumn(), console=err, transient=False) as prog:
        task = prog.add_task("indexing", total=None, hours=0.0, speed="")

        def progress(event, **info):
            if event == "start":
                prog.update(task, total=info["files"])
                state["t0"] = __import__("time").time()
            elif event == "file":
                state["audio"] += info["seconds"]
                el = max(1e-6, __import__("time").time() - state["t0"])
                speed = f"{state['audio'] / el:.0f}x real time" if state["audio"] else ""
                prog.update(task, advance=1, hours=state["audio"] / 3600, speed=speed,
                            description=f"{info['status']}: {info['path'][-40:]}")
                if info["status"] == "failed":
                    prog.console.print(f"[yellow]skipped[/] {info.get('error', info['path'])}", highlight=False, soft_wrap=True)

        rep = index_archive(archive, index, models, progress=progress, wait=wait)
    if previous.exists() and (index / "trawl-index.json").exists():
        from .indexing import carry_settings

        carried = carry_settings(previous, index)
        err.print(f"re-indexed with the installed model; carried over: {', '.join(carried) or 'nothing'}; "
                  "calibrate again (the old calibration described the old model's scores)", highlight=False)
    if as_json:
        _print_json({"indexed": rep.indexed, "unchanged": rep.unchanged,
                     "failed": [{"path": p, "error": e} for p, e in rep.failed],
                     "removed": rep.removed, "renamed": [list(r) for r in rep.renamed], "repaired": rep.repaired,
                     "audio_seconds": rep.audio_seconds, "not_indexed_seconds": rep.skipped_seconds,
                     "windows_added": rep.windows, "total_broadcasts": rep.total_broadcasts,
                     "total_windows": rep.total_windows, "wall_seconds": rep.wall_seconds})
        if rep.failed:
            raise typer.Exit(1)
        return
    t = Table(title=f"Index {index}", show_header=False)
    t.add_row("broadcasts indexed now", str(len(rep.indexed)))
    t.add_row("unchanged (skipped)", str(len(rep.unchanged)))
    t.add_row("failed (skipped)", str(len(rep.failed)))
    for label, items in (("gone from the archive (removed)", rep.removed), ("renamed (work kept)", [f"{a} -> {b}" for a, b in rep.renamed]),
                         ("left out on request (trawl remove)", rep.excluded), ("damaged index files (re-embedded)", rep.repaired)):
        if items:
            t.add_row(label, f"{len(items)}: {'; '.join(items[:5])}{' ...' if len(items) > 5 else ''}")
    t.add_row("audio indexed now", f"{rep.audio_seconds / 3600:.2f} h")
    if rep.audio_seconds:
        t.add_row("not indexed (silence, music)", f"{rep.skipped_seconds / 60:.1f} min ({100 * rep.skipped_seconds / rep.audio_seconds:.0f}%)")
        t.add_row("speed", f"{rep.audio_seconds / max(rep.wall_seconds, 1e-6):.0f}x real time")
    t.add_row("windows added now", str(rep.windows))
    t.add_row("in the index now", f"{rep.total_broadcasts} broadcasts, {rep.total_windows} windows")
    out.print(t)
    if rep.failed:
        for path, e in rep.failed:
            err.print(f"[yellow]failed:[/] {e}", highlight=False, soft_wrap=True)
        err.print(f"{len(rep.failed)} file(s) failed and are not searchable; `trawl status --index {index}` lists them",
                  highlight=False, soft_wrap=True)
        raise typer.Exit(1)


# ----------------------------------------------------------------- search
def _read_terms(terms: List[str], terms_file: Optional[Path]) -> List[str]:
    return [t for t, _ in _numbered_terms(terms, terms_file)]


def _numbered_terms(terms: List[str], terms_file: Optional[Path]) -> list[tuple[str, str]]:
    """(term, where it came from): 'term N' for arguments, 'FILE line N' for the terms file."""
    allterms = [(t, f"term {i}") for i, t in enumerate(terms or [], 1)]
    if terms_file:
        try:
            text = terms_file.read_text(encoding="utf-8-sig")
        except FileNotFoundError:
            raise TrawlError(f"terms file {terms_file} not found") from None
        except IsADirectoryError:
            raise TrawlError(f"terms file {terms_file} is a folder: give a text file with one term per line") from None
        except OSError as e:
            raise TrawlError(f"terms file {terms_file} cannot be read ({e.strerror})") from None
        except UnicodeDecodeError:
            raise TrawlError(f"terms file {terms_file} is not UTF-8 text") from None
        allterms += [(ln.strip(), f"{terms_file} line {i}") for i, ln in enumerate(text.splitlines(), 1)
                     if ln.strip() and not ln.lstrip().startswith("#")]
    if not allterms:
        raise TrawlError("give at least one term to search for (as arguments or with --terms FILE)")
    return allterms


def _speech_example(wav: Path):
    """The samples of an example recording, or a TrawlError when it holds no speech."""
    from . import audio
    from .features import log_mel
    from .gating import speech_mask

    x = audio.load(wav)
    if not speech_mask(log_mel(x)).any():
        raise TrawlError(f"the example {wav} holds no speech (silence, noise or music only): record the word itself")
    return x


def _parse_span(text: str, what: str) -> tuple[str, float, float]:
    """'PATH@START-END' -> (path, start, end)."""
    if "@" not in text or "-" not in text.rsplit("@", 1)[1]:
        raise TrawlError(f"{what} must look like PATH@START-END (seconds), e.g. news/monday.opus@61.2-61.9")
    path, span = text.rsplit("@", 1)
    a, b = span.split("-", 1)
    try:
        return path, float(a), float(b)
    except ValueError:
        raise TrawlError(f"{what}: {span!r} is not START-END in seconds") from None


def _short_time(seconds: float) -> str:
    """H:MM:SS.s (the compact table's times; the CSV keeps milliseconds)."""
    tenths = int(round(seconds * 10))
    h, rest = divmod(tenths, 36000)
    m, rest = divmod(rest, 600)
    return f"{h}:{m:02d}:{rest // 10:02d}.{rest % 10}"


def hits_table(hits, calibrated: bool, title: str, width: int | None = None) -> Table:
    """The hits as a table; below 110 columns a compact layout (one time column, the spelling
    searched only where it differs from the term) keeps broadcast paths whole."""
    from .export import format_hms

    narrow = (width if width is not None else out.width) < 110
    t = Table(title=title)
    if narrow:
        cols = ["term", "#", "broadcast", "time", "conf."] + (["ok"] if calibrated else [])
    else:
        cols = ["term", "searched", "rank", "broadcast", "start", "end", "score", "confidence"] + (["accepted"] if calibrated else [])
    for col in cols:
        t.add_column(col, justify="right" if col in ("rank", "#", "score", "confidence", "conf.") else "left",
                     overflow="fold", no_wrap=col in ("start", "end", "rank", "#", "score", "time", "conf.", "ok"),
                     min_width=12 if col in ("start", "end") else None, ratio=3 if col == "broadcast" and narrow else None)
    for h in hits:
        searched = h.extra.get("searched", "")
        if narrow:
            term = h.term if not searched or searched == h.term else f"{h.term} ({searched})"
            row = [term, str(h.rank), h.broadcast, f"{_short_time(h.start)}-{_short_time(h.end)}", f"{h.confidence:.2f}"]
        else:
            row = [h.term, searched, str(h.rank), h.broadcast, format_hms(h.start), format_hms(h.end), f"{h.score:.2f}", f"{h.confidence:.2f}"]
        if calibrated:
            row.append("yes" if h.accepted else "no")
        t.add_row(*row)
    return t


@app.command("search")
@friendly
def search_cmd(
    terms: List[str] = typer.Argument(None, help="Words to find, as spelled; quote a phrase."),
    index: Path = IndexOpt,
    terms_file: Optional[Path] = typer.Option(None, "--terms", help="A UTF-8 text file with one term per line."),
    top: int = typer.Option(10, "--top", "-n", help="Most hits to list for each term."),
    csv_path: Optional[Path] = typer.Option(None, "--csv", help="Also write the hits to this CSV file."),
    as_json: bool = typer.Option(False, "--json", help="Print the hits as JSON (for programs) instead of a table."),
    show_all: bool = typer.Option(False, "--all", help="With a calibration: list every hit, not only those above the threshold."),
    rules: Optional[Path] = typer.Option(None, "--rules", help="A spelling-rules file to apply to the terms (instead of the index's)."),
    no_adapt: bool = typer.Option(False, "--no-adapt", help="Ignore the adaptation learned with `trawl adapt`."),
    ignore_marks: bool = typer.Option(False, "--ignore-marks", help="Drop accents and tone marks from the terms before searching."),
    like: List[str] = typer.Option(None, "--like", help="Also use this indexed stretch as an example: PATH@START-END (seconds). Repeatable."),
    example: List[Path] = typer.Option(None, "--example", help="Also use this recording (a WAV file holding just the word) as an example. Repeatable."),
    clips: Optional[Path] = typer.Option(None, "--clips", help="Write each hit as a short WAV (with 0.5 s around it) into this folder."),
    archive: Optional[Path] = typer.Option(None, "--archive", help="The archive folder, for --clips (default: the one recorded in the index)."),
    no_refine: bool = typer.Option(False, "--no-refine", help="For searches by example: keep the index's coarse window times (no audio is read). Typed terms are always placed by aligning their letters."),
    models: Optional[str] = ModelsOpt,
):
    """Search an index for typed words; list the hits, best first.

    Each hit has a start and end time in its broadcast, a score (higher is better), and a
    confidence. The confidence is a probability only after `trawl calibrate`; until then it is
    an uncalibrated map of the score. Examples (--like, --example) are averaged with the spelling;
    with examples and no term, the search is by example alone (give a name with one term).
    """
    import numpy as np

    from .export import hits_to_json, write_csv
    from .refine import refine_hits
    from .rules import load_rules
    from .search import Searcher
    from .spelling import strip_marks

    if top < 1:
        raise TrawlError("--top must be at least 1")
    by_example = bool(like or example) and not (terms or terms_file)  # examples alone, no spelling
    all_terms = [("(example)", "")] if by_example else _numbered_terms(terms, terms_file)
    rs = load_rules(rules) if rules else None
    s = Searcher(index, models, rules=rs, adapt=not no_adapt)
    for w in s.warnings:
        err.print(f"[yellow]warning:[/] {w}", highlight=False, soft_wrap=True)
    ex_vecs = []
    for item in like or []:
        ex_vecs.append(s.window_vector(*_parse_span(item, "--like")))
    for wav in example or []:
        from . import api

        x = _speech_example(wav)
        ex_vecs.append(api.embed_spans(x, 16000, [(0.0, len(x) / 16000)], models)[0])
    calibrated = s.calibration is not None
    hits, below, bad, summary = [], 0, [], []
    for t, where in all_terms:
        if by_example:
            term, v = t, np.mean([e / np.linalg.norm(e) for e in ex_vecs], axis=0)
        else:
            try:
                term, v = s.query(strip_marks(t) if ignore_marks else t, ex_vecs)
            except TrawlError as e:  # a bad term is reported with where it came from; the others are searched
                bad.append(f"{where}: {e}")
                continue
        found = s.search_vector(term, v, top=None if calibrated and not show_all else top,
                                letters=0 if by_example else None)
        if found:
            summary.append(_decision(found[0], s))
        if calibrated and not show_all:
            kept = [h for h in found if h.accepted]
            below += len(found) - len(kept)
            found = kept[:top]
        if not no_refine and found:
            refine_hits(found, v / np.linalg.norm(v), Path(archive or s.index.manifest.get("archive", "")), s.models)
        hits += found
    if bad and len(bad) == len(all_terms):
        if len(bad) == 1:
            raise TrawlError(bad[0])
        for b in bad:
            err.print(f"[bold red]error:[/] {b}", highlight=False, soft_wrap=True)
        raise typer.Exit(1)
    applied = (f"{s.calibration.threshold:.4f}: calibrated, for precision {s.calibration.target_precision:.2f}"
               if calibrated else "none: uncalibrated confidence")
    for h in hits:
        h.extra["threshold_applied"] = applied
    if csv_path:
        write_csv(hits, csv_path, calibrated=calibrated)
    if clips:
        from .clips import write_clips

        write_clips(hits, clips, archive or s.index.manifest.get("archive"))
    if as_json:
        sys.stdout.write(hits_to_json(hits, calibrated=calibrated) + "\n")
        return _report_bad(bad)
    title = "Hits (confidence calibrated)" if calibrated else "Hits (confidence uncalibrated: run trawl calibrate)"
    out.print(hits_table(hits, calibrated, title))
    if calibrated and not show_all:
        out.print(f"{below} more candidate hits fell below the calibrated threshold "
                  f"({s.calibration.threshold:.2f}); --all lists them.")
    if summary:
        out.print(decision_table(summary))
    if csv_path:
        out.print(f"wrote {len(hits)} hits to {csv_path}")
    out.print("[dim]Hits are candidates: listen to each before anyone is quoted or a record is changed.[/]")
    _report_bad(bad)


def _report_bad(bad: list[str]) -> None:
    """Each term that could not be searched, one line each on stderr; exit 1 after the others' output."""
    for b in bad:
        err.print(f"[bold red]error:[/] {b}", highlight=False, soft_wrap=True)
    if bad:
        raise typer.Exit(1)


def _decision(hit, s) -> dict:
    """A term's decision record: what was searched, its expected count, and which threshold applies, and why."""
    x = hit.extra
    if s.calibration is not None:
        why = (f"calibrated threshold for precision {s.calibration.target_precision:.2f} "
               f"(the TWV threshold is reported, not applied)")
        applied = s.calibration.threshold
    else:
        why = "none applied: the confidence is uncalibrated (run trawl calibrate); TWV threshold reported"
        applied = None
    return {"term": hit.term, "searched": x.get("searched", ""), "expected": x.get("expected_count"),
            "twv": x.get("twv_threshold"), "applied": applied, "why": why}


def decision_table(rows: list[dict]) -> Table:
    t = Table(title="Thresholds per term (TWV threshold: keyword-specific thresholding from the expected count)")
    for c in ("term", "searched", "expected occurrences", "TWV threshold", "applied threshold", "why"):
        t.add_column(c, justify="right" if c in ("expected occurrences", "TWV threshold", "applied threshold") else "left")
    for r in rows:
        t.add_row(r["term"], r["searched"], "-" if r["expected"] is None else f"{r['expected']:.2f}",
                  "-" if r["twv"] is None else f"{r['twv']:.3f}",
                  "-" if r["applied"] is None else f"{r['applied']:.3f}", r["why"])
    return t


def _write_sample(hits, out_file: Optional[Path]) -> None:
    """A sample of hits to check, as a hits CSV with an empty verdict column (to a file or stdout)."""
    from .export import write_csv

    for h in hits:
        h.accepted = None
    if out_file:
        write_csv(hits, out_file, calibrated=False)
        out.print(f"wrote {len(hits)} hits to check to {out_file}: mark each by ear with "
                  f"`trawl check {out_file} --index INDEX` (or fill its verdict column with yes or no)", highlight=False)
    else:
        write_csv(hits, sys.stdout, calibrated=False)


# ----------------------------------------------------------------- calibrate
@app.command("calibrate")
@friendly
def calibrate_cmd(
    index: Path = IndexOpt,
    checked: Optional[Path] = typer.Option(None, "--checked", help="A checked sample: a hits CSV whose verdict column you filled with yes/no."),
    target_precision: float = typer.Option(0.9, "--target-precision", help="Share of accepted hits that should be correct (0-1)."),
    diagram: Optional[Path] = typer.Option(None, "--diagram", help="Where to write the reliability diagram (SVG); default beside the sample."),
    suggest_n: Optional[int] = typer.Option(None, "--suggest", help="Instead of calibrating: propose this many hits to check."),
    as_json: bool = typer.Option(False, "--json", help="Print the calibration report as JSON (for programs) instead of a table."),
    terms_file: Optional[Path] = typer.Option(None, "--terms", help="With --suggest: the terms to draw hits for (one per line)."),
    out_file: Optional[Path] = typer.Option(None, "--csv", "--out", help="With --suggest: write the sample to this CSV (default: print it). --out is an alias."),
    models: Optional[str] = ModelsOpt,
):
    """Make confidences mean what they say, from hits you checked by ear.

    Listen to a sample of hits, mark each yes or no in the verdict column of the CSV, and
    run this. From then on `trawl search` shows calibrated confidences and, by default, only
    hits at or above the threshold chosen for the target precision.
    """
    from .workflows import calibrate, suggest

    if suggest_n is not None:
        _write_sample(suggest(index, _read_terms([], terms_file), suggest_n, models_dir=models), out_file)
        return
    if checked is None:
        raise TrawlError("give the checked sample with --checked FILE (or --suggest N to make one)")
    cal, svg = calibrate(index, checked, target_precision, diagram, models)
    r = cal.report
    if as_json:
        _print_json({"method": cal.method, "threshold": cal.threshold, "target_precision": cal.target_precision,
                     "report": r, "twv": cal.twv, "diagram": str(svg)})
        return
    t = Table(title=f"Calibration ({cal.method}), stored in {index}")
    t.add_column("measure")
    t.add_column("value", justify="right")
    t.add_column("95% interval", justify="right")

    def num(key):
        v = r.get(key)
        return "-" if v is None or v != v else f"{v:.3f}"  # nothing accepted: no precision to report

    def iv(key):
        v = r.get(key)
        return f"{v[0]:.2f}-{v[1]:.2f}" if isinstance(v, (list, tuple)) and len(v) == 2 else ""

    t.add_row("checked hits (correct)", f"{r.get('n', '')} ({r.get('n_correct', '')})", "")
    t.add_row("threshold (confidence)", f"{cal.threshold:.3f}", "")
    t.add_row(f"precision at threshold (target {cal.target_precision:.2f})", num("precision"), iv("precision_ci"))
    t.add_row("recall at threshold (of checked correct hits)", num("recall"), iv("recall_ci"))
    t.add_row("expected calibration error", num("ece"), "")
    t.add_row("Brier score", num("brier"), "")
    per_term = cal.twv.get("per_term", {})
    if per_term:
        th = sorted(v["threshold"] for v in per_term.values())
        t.add_row("TWV-optimal term thresholds (reported, not applied)",
                  f"{th[len(th) // 2]:.3f} median", f"{th[0]:.3f}-{th[-1]:.3f}")
    out.print(t)
    out.print("Quality figures are from held-out folds of terms (each term's hits predicted by a map fitted without them).")
    for w in r.get("warnings", []):
        out.print(f"[yellow]warning:[/] {w}", highlight=False)
    out.print(f"reliability diagram: {svg}")


# ----------------------------------------------------------------- adapt
@app.command("adapt")
@friendly
def adapt_cmd(
    index: Path = IndexOpt,
    checked: Optional[Path] = typer.Option(None, "--checked", help="A checked sample (hits CSV with the verdict column filled)."),
    aligned: Optional[Path] = typer.Option(None, "--aligned", help="Also learn from a word-aligned corpus folder "
                                           "(utterances.tsv, words.tsv, audio/), e.g. a few transcribed recordings."),
    suggest_n: Optional[int] = typer.Option(None, "--suggest", help="Instead of adapting: propose this many hits to "
                                            "check: each term's two best hits first (as many terms as possible)."),
    as_json: bool = typer.Option(False, "--json", help="Print the adaptation report as JSON (for programs) instead of a table."),
    terms_file: Optional[Path] = typer.Option(None, "--terms", help="With --suggest: the terms to draw hits for (one per line)."),
    out_file: Optional[Path] = typer.Option(None, "--csv", "--out", help="With --suggest: write the sample to this CSV (default: print it). --out is an alias."),
    models: Optional[str] = ModelsOpt,
):
    """Teach the query side your language's spelling habits from checked hits.

    Learns respelling rules (from what the model hears in the confirmed hits) and a small
    map applied to every typed term's vector; the archive is not re-indexed and its vectors
    never change. Each is switched on only if it helps on terms held out from fitting;
    `trawl search --no-adapt` ignores both.
    """
    from .workflows import adapt, suggest_for_adaptation

    if suggest_n is not None:
        _write_sample(suggest_for_adaptation(index, _read_terms([], terms_file), suggest_n, models), out_file)
        return
    if checked is None:
        raise TrawlError("give the checked sample with --checked FILE (or --suggest N --terms FILE to make one)")
    rep = adapt(index, checked, models, aligned=aligned)
    if as_json:
        _print_json(rep)
        return

    def cv(x):
        return "-" if x is None else f"{x:.3f}"

    rules = rep.get("rules", {})
    t = Table(title="Adaptation (held-out terms, cross-validated)")
    for c in ("lever", "MAP before", "MAP after", "MTWV before", "MTWV after", "switched on", "why"):
        t.add_column(c)
    for name, r in (("learned respelling rules", rules), ("query map", rep)):
        t.add_row(name, cv(r.get("before_map")), cv(r.get("after_map")), cv(r.get("before_mtwv")),
                  cv(r.get("after_mtwv")), "yes" if r.get("enabled") else "no", str(r.get("reason", "")))
    out.print(t)
    out.print("MTWV here is an estimate from the checked sample: its confirmed hits stand for all of a "
              "term's occurrences, and a sample of archive windows for its false alarms", highlight=False)
    if rep.get("aligned_words"):
        out.print(f"learned from {rep['checked_hits']} checked hits and {rep['aligned_words']} aligned words")
    if rules.get("learned"):
        out.print("learned rules, in order (`trawl status` shows whether they are on):")
        for line in rules["learned"]:
            out.print(f"  {line}", highlight=False)
    if rep.get("recalibrated"):
        out.print("the calibration was refitted for the adapted queries")


# ----------------------------------------------------------------- rules
@rules_app.command("set")
@friendly
def rules_set(file: Path = typer.Argument(..., help="Rules file (see the README for its syntax)."), index: Path = IndexOpt):
    """Store a spelling-rules file in the index; every search then applies it."""
    from .index_store import Index
    from .rules import load_rules

    rs = load_rules(file)
    with Index.open(index).settings_change() as idx:
        idx.write_text("rules.txt", file.read_text(encoding="utf-8-sig"))
    out.print(f"stored {len(rs)} rules in {index}")


@rules_app.command("show")
@friendly
def rules_show(index: Path = IndexOpt, term: Optional[str] = typer.Option(None, "--try", help="Show how the stored rules rewrite this term (`trawl rules try` also shows the learned rules).")):
    """Show the rules stored in the index (and try them on a term)."""
    from .index_store import Index
    from .rules import parse_rules

    text = Index.open(index).read_text("rules.txt")
    if not text:
        out.print("no rules stored in this index")
        return
    rs = parse_rules(text, "rules stored in the index")
    out.print(rs.to_text())
    if term:
        out.print(f"{term} -> {rs.apply(term)}")


@rules_app.command("try")
@friendly
def rules_try(
    words: List[str] = typer.Argument(..., help="Words to respell, as you would type them."),
    rules: Optional[Path] = typer.Option(None, "--rules", help="A rules file to try before storing it (default: the index's stored rules)."),
    index: Optional[Path] = typer.Option(None, "--index", "-i", help="An index: its stored rules (unless --rules) and its learned rules."),
    models: Optional[str] = ModelsOpt,
):
    """Show how a word is respelled before search: your rules, then the learned ones.

    Warns about letters and signs the model does not know (they are not heard as written).
    """
    import unicodedata

    from .models import load
    from .rules import load_rules, parse_rules
    from .spelling import check_term

    if rules is None and index is None:
        raise TrawlError("give a rules file with --rules FILE, an index with --index DIR, or both")
    idx = None
    if index is not None:
        from .index_store import Index

        idx = Index.open(index)
    yours = load_rules(rules) if rules else None
    if yours is None and idx is not None and idx.read_text("rules.txt"):
        yours = parse_rules(idx.read_text("rules.txt"), "rules stored in the index")
    learned, learned_on = None, False
    if idx is not None:
        from .rule_learning import LEARNED_RULES_FILE, LearnedRules

        lr = idx.read_setting(LEARNED_RULES_FILE)
        if lr:
            stored = LearnedRules.from_dict(lr)
            learned, learned_on = stored.ruleset(), stored.enabled
    known = set(load(models).symbols)
    t = Table(title="Respelling (search reads the last column)")
    for c in ("typed", "your rules" if yours else "your rules (none)",
              "learned rules" + ("" if learned is None else " (on)" if learned_on else " (off: not applied)"),
              "searched as", "not known to the model"):
        t.add_column(c, overflow="fold")
    warn = False
    for word in words:
        typed = check_term(word)
        first = yours.apply(typed) if yours else typed
        second = learned.apply_or_keep(first) if learned is not None else first
        final = second if learned_on else first
        unknown = sorted({c for c in unicodedata.normalize("NFD", final) if not c.isspace() and c not in known})
        warn = warn or bool(unknown)
        t.add_row(typed, first, second if learned is not None else "-", final,
                  " ".join(f"{c!r} (U+{ord(c):04X})" for c in unknown))
    out.print(t)
    if warn:
        out.print("[yellow]warning:[/] the model does not read some signs above; write rules that replace "
                  "them with letters it knows (the model card's symbols)", highlight=False)


@rules_app.command("clear")
@friendly
def rules_clear(index: Path = IndexOpt):
    """Remove the stored rules."""
    from .index_store import Index

    with Index.open(index).settings_change() as idx:
        idx.write_text("rules.txt", None)
    out.print("rules removed")


# ----------------------------------------------------------------- evaluate
@app.command("evaluate")
@friendly
def evaluate_cmd(
    index: Path = IndexOpt,
    reference: Path = typer.Option(..., "--reference", help="Word timings of transcribed broadcasts: columns broadcast, start, end, word."),
    terms_file: Path = typer.Option(..., "--terms", help="Terms to evaluate, one per line."),
    as_json: bool = typer.Option(False, "--json", help="Print the results as JSON."),
    csv_path: Optional[Path] = typer.Option(None, "--csv", help="Also write the per-term results to this CSV file."),
    models: Optional[str] = ModelsOpt,
):
    """Measure search quality on broadcasts you have transcribed (MTWV, ATWV, P@10, recall)."""
    from .evaluate_run import evaluate

    res = evaluate(index, reference, _read_terms([], terms_file), models)
    if csv_path:
        _write_evaluation_csv(res, csv_path)
    if as_json:
        sys.stdout.write(json.dumps(res, indent=1, ensure_ascii=False) + "\n")
        return
    out.print(evaluation_table(res))


def evaluation_table(res: dict, where: str = "at the applied threshold") -> Table:
    t = Table(title=f"Evaluation over {res['searched_hours']:.2f} h (TWV with beta 999.9, 0.5 s tolerance; "
                    f"ATWV {where})")
    for c in ["term", "occurrences", "ATWV", "P@10", "recall@100"]:
        t.add_column(c, justify="left" if c == "term" else "right")
    for term, r in res["per_term"].items():
        t.add_row(term, str(r["occurrences"]), f"{r['twv']:.3f}" if r["twv"] is not None else "-", f"{r['p_at_10']:.2f}", f"{r['recall_at_100']:.2f}")
    t.add_row("[bold]all terms[/]", str(res["occurrences"]), f"{res['atwv']:.3f}", f"{res['p_at_10']:.2f}", f"{res['recall_at_100']:.2f}")
    t.caption = f"MTWV {res['mtwv']:.3f} (at {res.get('ranked_by', 'score')} {res['mtwv_threshold']:.2f}); ATWV {where} {res['atwv']:.3f}"
    return t


# ----------------------------------------------------------------- demo / status
@app.command("demo")
@friendly
def demo_cmd(
    index: Optional[Path] = typer.Option(None, "--index", "-i", help="Index folder for the demo (default: a temporary one)."),
    csv_path: Path = typer.Option(Path("hits.csv"), "--csv", help="Where to write the demo's hits."),
):
    """Index the bundled demo broadcasts, search example terms, and score the result."""
    from .demo import run_demo

    run_demo(index, csv_path, out, err)


@app.command("status")
@friendly
def status_cmd(index: Path = IndexOpt,
               as_json: bool = typer.Option(False, "--json", help="Print the status as JSON (for programs) instead of a table."),
               verify: bool = typer.Option(False, "--verify", help="Check every index file against the sizes and "
                                           "SHA-256 recorded when it was written; exit 3 if any is damaged.")):
    """What an index holds: broadcasts, hours, model, calibration, rules, adaptation, failed files.
    Reads only: nothing in the index is created or changed."""
    from .index_store import Index

    from .rule_learning import LEARNED_RULES_FILE

    idx = Index.open(index)
    b = idx.broadcasts()
    cal = idx.read_setting("calibration.json")
    rules_text = idx.read_text("rules.txt") or ""
    qm = idx.read_setting("query_map.json")
    lr = idx.read_setting(LEARNED_RULES_FILE)
    n_rules = len(lr.get("rules", "").splitlines()) if lr else 0
    fails = idx.failures()
    facts = {  # one word for a setting's state everywhere: on or off
        "broadcasts": len(b), "audio_hours": round(sum(r["duration"] for r in b) / 3600, 4),
        "windows": sum(r["n_windows"] for r in b), "model_card": idx.manifest["model_card_sha256"][:16],
        "calibration": "on" if cal else "off",
        "spelling_rules": "on" if rules_text.strip() else "off",
        "query_map": "on" if qm and qm.get("report", {}).get("enabled") else "off",
        "learned_rules": "on" if lr and lr.get("enabled") else "off",
        "learned_rules_count": n_rules, "failed_files": [{"path": p, "error": e} for p, e in fails],
    }
    if idx.excluded():
        facts["left_out_on_request"] = sorted(idx.excluded())
    if as_json and not verify:
        _print_json(facts)
        return
    t = Table(title=f"Index {index}", show_header=False)
    t.add_row("broadcasts", str(facts["broadcasts"]))
    t.add_row("audio", f"{facts['audio_hours']:.2f} h")
    t.add_row("windows", str(facts["windows"]))
    t.add_row("model card", facts["model_card"])
    t.add_row("calibration", f"on (threshold {cal.get('threshold', float('nan')):.2f})" if cal else "off (run trawl calibrate)")
    t.add_row("spelling rules", "on" if rules_text.strip() else "off")
    t.add_row("adaptation: query map", facts["query_map"] + ("" if facts["query_map"] == "on" else
                                                             " (did not help)" if qm else " (not learned)"))
    t.add_row("adaptation: learned rules", facts["learned_rules"] + (f" ({n_rules} rules)" if lr else " (not learned)")
              + (", did not help" if lr and not lr.get("enabled") else ""))
    t.add_row("failed files", str(len(fails)))
    for path, e in fails:
        t.add_row(f"  {path}", e)
    if idx.excluded():
        t.add_row("left out on request", ", ".join(sorted(idx.excluded())))
    if not as_json:
        out.print(t)
    if verify:
        from .integrity import verify as check

        with idx.snapshot():
            damage = check(idx)
        if as_json:
            facts["damaged_files"] = [{"file": d.file, "problem": d.what, "broadcasts": list(d.paths)} for d in damage]
            _print_json(facts)
            if damage:
                raise typer.Exit(3)
            return
        if not damage:
            out.print("verified: every index file matches what was recorded when it was written")
            return
        v = Table(title="Damaged index files")
        v.add_column("file")
        v.add_column("problem")
        v.add_column("broadcasts it holds")
        for d in damage:
            v.add_row(d.file, d.what, ", ".join(d.paths))
        out.print(v)
        err.print(f"[bold red]error:[/] {len(damage)} index file(s) damaged: run `trawl index "
                  f"{idx.manifest.get('archive', 'ARCHIVE_DIR')} --index {index}` to repair them "
                  "(only the broadcasts they hold are embedded again)", highlight=False, soft_wrap=True)
        raise typer.Exit(3)


@app.command("remove")
@friendly
def remove_cmd(broadcasts: List[str] = typer.Argument(..., help="Broadcasts as search lists them (path relative to the archive folder)."),
               index: Path = IndexOpt,
               restore: bool = typer.Option(False, "--restore", help="Let later `trawl index` runs index these again."),
               wait: bool = WaitOpt):
    """Take broadcasts out of an index now (for consent or access policy) and keep them out of
    later runs; the audio files are not touched."""
    from .indexing import remove_from_index

    done = remove_from_index(index, broadcasts, restore=restore, wait=wait)
    out.print(f"{'restored (the next trawl index run indexes them)' if restore else 'removed from the index'}: "
              f"{', '.join(done)}", highlight=False)


def _print_json(obj) -> None:
    sys.stdout.write(json.dumps(obj, indent=1, ensure_ascii=False, default=str) + "\n")


def _write_evaluation_csv(res: dict, path: Path) -> None:
    """Per-term evaluation results as RFC 4180 CSV (terms formula-guarded, like the hit list)."""
    import csv
    import io

    from .export import guard
    from .index_store import atomic_write

    buf = io.StringIO()
    w = csv.writer(buf, lineterminator="\r\n")
    w.writerow(["term", "occurrences", "twv", "p_at_10", "recall_at_100"])
    for term, r in res["per_term"].items():
        w.writerow([guard(term), r["occurrences"], "" if r["twv"] is None else f"{r['twv']:.4f}",
                    f"{r['p_at_10']:.4f}", f"{r['recall_at_100']:.4f}"])
    atomic_write(Path(path), buf.getvalue().encode("utf-8"))


# ----------------------------------------------------------------- check
@app.command("check")
@friendly
def check_cmd(
    sample: Path = typer.Argument(..., help="A hit-list CSV to check: a search's --csv, or a --suggest sample."),
    index: Path = IndexOpt,
    no_browser: bool = typer.Option(False, "--no-browser", help="Only print the page's address; do not open a browser."),
    port: int = typer.Option(0, "--port", help="Port on 127.0.0.1 to serve the page on (default: any free port)."),
    archive: Optional[Path] = typer.Option(None, "--archive", help="The archive folder (default: the one recorded in the index)."),
):
    """Listen to each hit of a sample on a local page and mark it yes or no.

    Every verdict is written into SAMPLE at once; run the same command again to carry on
    where you stopped. The page is served on 127.0.0.1 only, at an address holding a secret.
    Press Ctrl-C to stop.
    """
    from .check_server import address, bind, open_session, serve

    session = open_session(sample, index, archive)
    sock = bind(port)
    url = address(session, sock)
    print(url, flush=True)  # on a line of its own, first: scripts wait for it
    done = sum(v is not None for v in session.sample.verdicts())
    err.print(f"checking {sample}: {done} of {len(session.sample.rows)} hits checked so far; Ctrl-C stops",
              highlight=False, soft_wrap=True)
    if not no_browser:
        import webbrowser

        if not webbrowser.open(url):
            err.print("could not open a browser: open the address above yourself", highlight=False)
    serve(session, sock)
    v = session.sample.verdicts()
    err.print(f"stopped: {sum(x is not None for x in v)} of {len(v)} hits checked "
              f"({sum(x is True for x in v)} yes, {sum(x is False for x in v)} no), all saved in {sample}",
              highlight=False, soft_wrap=True)
    raise typer.Exit(130)  # ../shared/CONTRACTS.md, exit codes: 130 interrupted (nothing is lost)


# ----------------------------------------------------------------- help text
def _plain_help_types() -> None:
    """Help shows a word for what an option takes (FILE, DIR, N...) and nothing on a flag, instead of
    typer's Python types (<bool>, <list[Path]>). Set once here, so every command gets it."""
    import inspect

    from typer.models import ArgumentInfo, OptionInfo

    folders = {"index", "archive", "clips", "aligned", "models", "archive_dir"}

    def word(name: str, annotation: str, is_argument: bool) -> str:
        a = str(annotation)
        if "bool" in a:
            return ""
        many = "List" in a or "list" in a
        if name in folders:
            w = "DIR"
        elif "Path" in a:
            w = "FILE"
        elif "int" in a:
            w = "N"
        elif "float" in a:
            w = "NUMBER"
        else:
            w = "TEXT"
        if is_argument:  # the usage line adds "..." to an argument that takes several
            w = name.upper().rstrip("S") if many else name.upper()
        return w  # a repeatable option says so in its help

    groups = [app] + [g.typer_instance for g in app.registered_groups]
    for group in groups:
        for command in group.registered_commands:
            for name, p in inspect.signature(command.callback).parameters.items():
                info = p.default
                if isinstance(info, (OptionInfo, ArgumentInfo)) and info.metavar is None:
                    info.metavar = word(name, p.annotation, isinstance(info, ArgumentInfo))
    try:  # an argument's type column ignores its metavar in typer >= 0.2x: show the metavar alone
        from typer.core import TyperArgument, TyperOption

        TyperArgument.display_type_rich = lambda self, ctx: None if self.metavar is not None else self.display_type(ctx)
        shown = TyperOption.display_type_rich
        TyperOption.display_type_rich = lambda self, ctx: None if self.is_flag else shown(self, ctx)  # --help too
    except (ImportError, AttributeError):  # pragma: no cover - older typer prints no types
        pass


_plain_help_types()


def main():  # pragma: no cover
    app()
