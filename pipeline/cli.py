"""The ``shotsmith`` command line: parse, call the Python API, print.

No logic lives here beyond turning options into settings overrides and results
into output. Heavy modules (torch above all) are imported inside the commands
that need them, so ``shotsmith --help`` and ``shotsmith ingest`` start fast.
"""

from __future__ import annotations

import json
import os
import sys
from collections.abc import Iterator
from contextlib import contextmanager
from functools import wraps
from pathlib import Path
from typing import Annotated, Any

import typer

from pipeline import __version__
from pipeline.errors import ShotsmithError

app = typer.Typer(
    name="shotsmith",
    help="Train a small VAE on your own one-shots and render new ones, on a laptop CPU.",
    no_args_is_help=True,
    add_completion=False,
    pretty_exceptions_enable=False,
    rich_markup_mode=None,  # plain help: the rich panels print "<bool>" after every flag
)

_state = {"debug": False}


ThreadsOpt = Annotated[
    int | None,
    typer.Option("--threads", min=1, help="CPU threads for torch (default: the cores this "
                 "process may use, shared among torchrun's processes on this machine)."),
]


def _version(value: bool) -> None:
    if value:
        typer.echo(f"shotsmith {__version__}")
        raise typer.Exit()


@app.callback()
def _root(
    debug: Annotated[bool, typer.Option("--debug", help="Show full tracebacks on errors.")] = False,
    version: Annotated[
        bool, typer.Option("--version", callback=_version, is_eager=True, help="Print the version.")
    ] = False,
    threads: ThreadsOpt = None,
) -> None:
    _state["debug"] = debug or os.environ.get("SHOTSMITH_DEBUG") == "1"
    from pipeline.runtime import prepare

    prepare(threads)  # before any command imports torch


def _friendly(func):
    """Turn the tool's errors into one line on stderr and exit code 1."""

    @wraps(func)
    def wrapper(*args, **kwargs):
        try:
            return func(*args, **kwargs)
        except ShotsmithError as exc:
            if _state["debug"]:
                raise
            typer.echo(f"error: {exc}", err=True)
            raise typer.Exit(1) from None
        except KeyboardInterrupt:
            if _state["debug"]:
                raise
            typer.echo("interrupted", err=True)
            if kwargs.get("as_json"):  # --json promises one object on stdout, even now
                typer.echo(json.dumps({"stopped": "interrupted", "exit_code": 130}))
            raise typer.Exit(130) from None
        except OSError as exc:
            if _state["debug"]:
                raise
            from pipeline.files import reason

            where = f"{exc.filename}: " if getattr(exc, "filename", None) else ""
            typer.echo(f"error: {where}{reason(exc)}", err=True)
            raise typer.Exit(1) from None

    return wrapper


def _emit(summary: dict[str, Any], as_json: bool, human: str) -> None:
    if as_json:
        typer.echo(json.dumps(summary, ensure_ascii=False, allow_nan=False))
    else:
        typer.echo(human)


def _show_progress(as_json: bool) -> bool:
    return sys.stderr.isatty() or os.environ.get("SHOTSMITH_PROGRESS") == "1"


# Options shared by several commands -------------------------------------------------------

PresetOpt = Annotated[
    str | None,
    typer.Option("--preset", help="Preset: tiny, drums, long, or a TOML file (default: the "
                 "bank's own settings, else drums)."),
]
JsonOpt = Annotated[bool, typer.Option("--json", help="Print one JSON summary object on stdout.")]
OverwriteOpt = Annotated[
    bool, typer.Option("--overwrite", help="Replace existing output files of the same name.")
]
IterOpt = Annotated[int | None, typer.Option("--iterations", help="Fast Griffin-Lim iterations.")]
BitDepthOpt = Annotated[
    str | None, typer.Option("--bit-depth", help="WAV sample format: 16, 24 or 32f.")
]
PeakOpt = Annotated[
    float | None, typer.Option("--peak-db", help="True-peak ceiling in dBTP (default -1).")
]
LoudOpt = Annotated[
    float | None,
    typer.Option("--loudness", help="Integrated loudness target in LUFS (BS.1770)."),
]
OutRateOpt = Annotated[
    int | None,
    typer.Option("--output-rate",
                 help="Write WAVs at this sample rate (e.g. 48000; soxr after reconstruction)."),
]
TrimOpt = Annotated[
    bool | None,
    typer.Option("--trim/--no-trim",
                 help="End each file where its sound ends (default: full length, silent tail)."),
]
SEED_MAX = 2**32 - 1  # pipeline.sounds.MAX_SEED (not imported: it would load numpy for --help)
COUNT_MAX = 100_000  # pipeline.sounds.MAX_SOUNDS
SPREAD_MAX = 100.0  # pipeline.latent.MAX_SPREAD
SeedOpt = Annotated[int | None, typer.Option("--seed", min=0, max=SEED_MAX,
                                             help="Random seed (repeatable output).")]
JobsOpt = Annotated[
    int | None,
    typer.Option("--jobs", min=1, max=256, help="Decoding processes (default: all cores)."),
]

# The setting each option overrides. The settings validate every value once, against their
# own ranges; a bad value that came from an option is reported as that option's usage error.
OPTION_OF = {
    "audio.sample_rate": "--sample-rate", "audio.duration": "--duration",
    "model.latent_dim": "--latent-dim", "train.epochs": "--epochs", "train.beta": "--beta",
    "train.seed": "--seed", "train.batch_size": "--batch-size",
    "render.iterations": "--iterations", "render.bit_depth": "--bit-depth",
    "render.peak_db": "--peak-db", "render.loudness": "--loudness",
    "render.output_rate": "--output-rate",
}


def _render_overrides(iterations, bit_depth, peak_db, loudness, output_rate, trim
                      ) -> dict[str, Any]:
    return {"iterations": iterations, "bit_depth": bit_depth, "peak_db": peak_db,
            "loudness": loudness, "output_rate": output_rate, "trim": trim}


@contextmanager
def _options_checked(overrides: dict[str, dict[str, Any]]) -> Iterator[None]:
    """Turn a settings error caused by an option the user gave into that option's usage error."""
    from pipeline.errors import PresetError

    try:
        yield
    except PresetError as exc:
        table, _, key = (exc.key or "").partition(".")
        if exc.key in OPTION_OF and overrides.get(table, {}).get(key) is not None:
            reason = str(exc).split(": ", 1)[-1]
            raise typer.BadParameter(reason, param_hint=OPTION_OF[exc.key]) from None
        raise


def _settings(preset: str | None, *, bank: Path | None = None, **overrides: dict[str, Any]):
    """``(settings, where they come from)``: ``--preset``, else the bank's own, else the
    default preset (:func:`pipeline.config.choose_settings`)."""
    from pipeline.bank import stored_settings
    from pipeline.config import choose_settings

    stored = stored_settings(bank) if preset is None and bank is not None else None
    with _options_checked(overrides):
        return choose_settings(preset, stored, overrides)


def _model_and_render(model: Path, iterations, bit_depth, peak_db, loudness, output_rate, trim):
    """The loaded model file and its render settings with the render options applied."""
    from pipeline.modelfile import load_model_file

    mf = load_model_file(model)
    overrides = {"render": _render_overrides(iterations, bit_depth, peak_db, loudness,
                                             output_rate, trim)}
    with _options_checked(overrides):
        return mf, mf.settings.with_overrides(overrides).render


# Commands -------------------------------------------------------------------------------


@app.command()
@_friendly
def ingest(
    source: Annotated[Path, typer.Argument(help="Folder of one-shots (searched recursively).")],
    bank: Annotated[Path, typer.Option("--bank", help="Bank folder to create or update.")],
    preset: PresetOpt = None,
    sample_rate: Annotated[
        int | None, typer.Option("--sample-rate", help="Resample every file to this rate (Hz).")
    ] = None,
    duration: Annotated[
        float | None, typer.Option("--duration", help="Fit every clip to this length (s).")
    ] = None,
    jobs: JobsOpt = None,
    as_json: JsonOpt = False,
) -> None:
    """Scan SOURCE, decode every usable one-shot and store its spectrogram in a bank."""
    from pipeline.ingest import ingest_folder
    from pipeline.progress import progress_bar

    settings, source_of_settings = _settings(
        preset, bank=bank, audio={"sample_rate": sample_rate, "duration": duration})
    with progress_bar("ingest", enabled=_show_progress(as_json)) as bar:
        summary = ingest_folder(source, bank, settings, jobs=jobs, progress=bar)
    s = summary.to_dict()
    _emit(
        s | {"settings_from": source_of_settings},
        as_json,
        f"{s['accepted']} clips in {bank} ({s['decoded']} decoded, {s['reused']} reused), "
        f"{s['skipped']} skipped, {s['ignored']} ignored; reasons in {bank / 'ingest-report.json'}"
        f"\nsettings: {source_of_settings}",
    )


@app.command()
@_friendly
def resynth(
    source: Annotated[Path, typer.Argument(help="Folder of one-shots to resynthesize.")],
    out: Annotated[Path, typer.Option("--out", help="Output folder for WAVs and manifest.json.")],
    preset: PresetOpt = None,
    iterations: IterOpt = None,
    bit_depth: BitDepthOpt = None,
    peak_db: PeakOpt = None,
    loudness: LoudOpt = None,
    output_rate: OutRateOpt = None,
    trim: TrimOpt = None,
    overwrite: OverwriteOpt = False,
    jobs: JobsOpt = None,
    as_json: JsonOpt = False,
) -> None:
    """Spectrogram -> Griffin-Lim -> WAV for every file, no model: the ceiling resynthesis sets."""
    from pipeline.progress import progress_bar
    from pipeline.resynth import resynth_folder

    settings, _ = _settings(
        preset, render=_render_overrides(iterations, bit_depth, peak_db, loudness, output_rate,
                                         trim))
    with progress_bar("resynth", enabled=_show_progress(as_json)) as bar:
        s = resynth_folder(source, out, settings, overwrite=overwrite, jobs=jobs, progress=bar)
    _emit(s, as_json, _written_line(s, out))


def _written_line(s: dict[str, Any], out: Path) -> str:
    line = f"wrote {s.get('written', 0)} WAVs and {out / 'manifest.json'}"
    if s.get("skipped"):
        line += f" ({s['skipped']} files skipped, reasons in the manifest)"
    if s.get("median_sc_db") is not None:
        line += f"; median spectral convergence {s['median_sc_db']:.1f} dB"
    short = s.get("loudness_unmet")
    if short:
        line += (f"\n{short['count']} of {short['of']} sounds could not reach "
                 f"{short['target_lufs']:g} LUFS under the {short['peak_db']:g} dBTP ceiling; "
                 f"the furthest, {short['file']}, is at {short['loudness_lufs']:.1f} LUFS "
                 f"({short['short_by_lu']:.1f} LU short)")
    return line


@app.command()
@_friendly
def train(
    bank: Annotated[Path, typer.Argument(help="Bank folder written by 'shotsmith ingest'.")],
    model: Annotated[Path, typer.Option("--model", help="Model file to write.")],
    preset: PresetOpt = None,
    epochs: Annotated[int | None, typer.Option("--epochs", help="Maximum epochs.")] = None,
    latent_dim: Annotated[
        int | None, typer.Option("--latent-dim", help="Size of the latent code.")
    ] = None,
    beta: Annotated[float | None, typer.Option("--beta", help="KL weight.")] = None,
    seed: SeedOpt = None,
    batch_size: Annotated[
        int | None, typer.Option("--batch-size", help="Clips per optimiser step.")
    ] = None,
    resume: Annotated[
        bool, typer.Option("--resume", help="Continue an interrupted run from its checkpoint.")
    ] = False,
    device: Annotated[str, typer.Option("--device", help="auto, cpu or cuda.")] = "auto",
    overwrite: Annotated[
        bool, typer.Option("--overwrite", help="Replace an existing model file and checkpoint.")
    ] = False,
    threads: ThreadsOpt = None,
    as_json: JsonOpt = False,
) -> None:
    """Train a VAE on a bank; writes one self-contained model file.

    Under torchrun (see the README) every process runs this command; rank 0 writes.
    """
    from pipeline.runtime import prepare

    threads = prepare(threads)  # before torch is imported
    from pipeline.progress import progress_bar
    from pipeline.train import train_model

    rank0 = os.environ.get("RANK", "0") == "0"

    settings, source_of_settings = _settings(
        preset,
        bank=bank,
        model={"latent_dim": latent_dim},
        train={"epochs": epochs, "beta": beta, "seed": seed, "batch_size": batch_size},
    )
    with progress_bar("train", enabled=_show_progress(as_json) and rank0) as bar:

        def on_epoch(info: dict[str, Any]) -> None:
            if info["event"] == "start":  # the bank and model file passed their checks
                typer.echo(f"settings: {source_of_settings}", err=True)
            bar(
                info["epoch"],
                info["epochs"],
                loss=info.get("train_loss"),
                val=info.get("val_loss"),
                recon=info.get("recon"),
                kl=info.get("kl"),
            )

        summary = train_model(
            bank,
            model,
            settings,
            resume=resume,
            progress=on_epoch,
            device=device,
            overwrite=overwrite,
            threads=threads,
        )
    s = summary.to_dict() | {"settings_from": source_of_settings}
    if rank0:
        _emit(s, as_json, format_train_summary(s))
    if s["stopped"] == "interrupted":
        if as_json and rank0:  # the JSON carries it too; a person watching stderr sees it once
            typer.echo(f"to resume: {s['resume_command']}", err=True)
        raise typer.Exit(130)


def format_train_summary(s: dict[str, Any]) -> str:
    """What a training run left behind, in words: the model file only if it exists."""
    if s["model"] is None:
        kept = "no model file yet (the first one is written when an epoch ends)"
    else:
        kept = (f"best validation loss {s['best_val_loss']:.4g} (recon {s['best_val_recon']:.4g}, "
                f"KL {s['best_val_kl']:.4g}) at epoch {s['best_epoch']}; model in {s['model']}")
    if s["stopped"] != "interrupted":
        return f"{s['stopped']} after {s['epochs']} epochs: {kept}"
    return (f"interrupted during epoch {s['epochs'] + 1}: {kept}; checkpoint in "
            f"{s['checkpoint']}\nto resume: {s['resume_command']}")


@app.command()
@_friendly
def generate(
    model: Annotated[Path, typer.Argument(help="Model file written by 'shotsmith train'.")],
    out: Annotated[Path, typer.Option("--out", help="Output folder.")],
    n: Annotated[int, typer.Option("-n", "--count", min=1, max=COUNT_MAX,
                                   help="How many one-shots.")] = 16,
    temperature: Annotated[
        float, typer.Option("--temperature", min=0.0, max=SPREAD_MAX,
                            help="Spread around where the library lives (1 = as fitted).")
    ] = 1.0,
    near: Annotated[
        str | None, typer.Option("--near", help="Sample near this category of the library.")
    ] = None,
    prior: Annotated[
        str, typer.Option("--prior", help="fitted: kernels at the library's codes (default); "
                                          "mixture: a smoother mixture (BIC); "
                                          "normal: the VAE prior N(0, I).")
    ] = "fitted",
    seed: SeedOpt = None,
    iterations: IterOpt = None,
    bit_depth: BitDepthOpt = None,
    peak_db: PeakOpt = None,
    loudness: LoudOpt = None,
    output_rate: OutRateOpt = None,
    trim: TrimOpt = None,
    overwrite: OverwriteOpt = False,
    as_json: JsonOpt = False,
) -> None:
    """New one-shots sampled where the library lives in latent space (or from the prior)."""
    from pipeline.create import generate_sounds
    from pipeline.progress import progress_bar

    mf, render = _model_and_render(model, iterations, bit_depth, peak_db, loudness,
                                   output_rate, trim)
    with progress_bar("generate", enabled=_show_progress(as_json)) as bar:
        s = generate_sounds(mf, out, n=n, temperature=temperature, near=near, seed=seed,
                            prior=prior,
                            render=render, overwrite=overwrite, progress=bar)
    _emit(s, as_json, _written_line(s, out))


@app.command()
@_friendly
def interpolate(
    model: Annotated[Path, typer.Argument(help="Model file.")],
    out: Annotated[Path, typer.Option("--out", help="Output folder.")],
    waypoints: Annotated[
        list[str] | None,
        typer.Argument(help="Two or more clip names (or audio files) to pass through, in order."),
    ] = None,
    steps: Annotated[int, typer.Option("--steps", min=2, max=COUNT_MAX,
                                       help="Sounds along the path.")] = 8,
    path: Annotated[str, typer.Option("--path", help="slerp (default) or lerp.")] = "slerp",
    jobs_file: Annotated[
        Path | None,
        typer.Option("--jobs-file", help="CSV or TOML file of many interpolations to render."),
    ] = None,
    seed: SeedOpt = None,
    iterations: IterOpt = None,
    bit_depth: BitDepthOpt = None,
    peak_db: PeakOpt = None,
    loudness: LoudOpt = None,
    output_rate: OutRateOpt = None,
    trim: TrimOpt = None,
    overwrite: OverwriteOpt = False,
    as_json: JsonOpt = False,
) -> None:
    """Sounds along a latent path from A to B (and on through C ...)."""
    from pipeline.create import interpolate_jobs, interpolate_sounds
    from pipeline.progress import progress_bar

    if path not in ("slerp", "lerp"):
        raise typer.BadParameter(f"{path!r} must be slerp or lerp", param_hint="--path")
    if jobs_file is None and len(waypoints or []) < 2:
        raise typer.BadParameter("give at least two sounds A B, or --jobs-file", param_hint="A B")
    if jobs_file is not None and waypoints:
        raise typer.BadParameter("give either sounds A B or --jobs-file, not both")
    mf, render = _model_and_render(model, iterations, bit_depth, peak_db, loudness,
                                   output_rate, trim)
    with progress_bar("interpolate", enabled=_show_progress(as_json)) as bar:
        common = dict(seed=seed, render=render, overwrite=overwrite, progress=bar)
        if jobs_file is not None:
            s = interpolate_jobs(mf, jobs_file, out, steps=steps, path=path, **common)
        else:
            s = interpolate_sounds(mf, waypoints, out, steps=steps, path=path, **common)
    _emit(s, as_json, _written_line(s, out))


@app.command()
@_friendly
def vary(
    model: Annotated[Path, typer.Argument(help="Model file.")],
    sound: Annotated[str, typer.Argument(help="A clip name from the model, or an audio file.")],
    out: Annotated[Path, typer.Option("--out", help="Output folder.")],
    n: Annotated[int, typer.Option("-n", "--count", min=1, max=COUNT_MAX,
                                   help="How many variations.")] = 8,
    amount: Annotated[
        float,
        typer.Option("--amount", min=0.0, max=SPREAD_MAX, help="Spread; 0 = its reconstruction."),
    ] = 1.0,
    seed: SeedOpt = None,
    iterations: IterOpt = None,
    bit_depth: BitDepthOpt = None,
    peak_db: PeakOpt = None,
    loudness: LoudOpt = None,
    output_rate: OutRateOpt = None,
    trim: TrimOpt = None,
    overwrite: OverwriteOpt = False,
    as_json: JsonOpt = False,
) -> None:
    """Variations around one sound's latent code."""
    from pipeline.create import vary_sound
    from pipeline.progress import progress_bar

    mf, render = _model_and_render(model, iterations, bit_depth, peak_db, loudness,
                                   output_rate, trim)
    with progress_bar("vary", enabled=_show_progress(as_json)) as bar:
        s = vary_sound(mf, sound, out, n=n, amount=amount, seed=seed, render=render,
                       overwrite=overwrite, progress=bar)
    _emit(s, as_json, _written_line(s, out))


@app.command()
@_friendly
def inspect(
    model: Annotated[Path, typer.Argument(help="Model file.")],
    out: Annotated[Path, typer.Option("--out", help="Folder for the figures and health.json.")],
    bank: Annotated[
        Path | None, typer.Option("--bank", help="The bank it was trained on (audio checks).")
    ] = None,
    seed: SeedOpt = None,
    overwrite: OverwriteOpt = False,
    as_json: JsonOpt = False,
) -> None:
    """Is the model safe to sample from? Latent map, reconstructions and a health table."""
    from pipeline.inspection import format_health_table, inspect_model

    health = inspect_model(model, out, bank=bank, seed=seed, overwrite=overwrite)
    _emit(health, as_json, format_health_table(health))


@app.command()
@_friendly
def info(
    model: Annotated[Path, typer.Argument(help="Model file written by 'shotsmith train'.")],
    as_json: JsonOpt = False,
) -> None:
    """What a model holds: its clips and categories, and how it was trained."""
    from pipeline.info import format_info, model_info

    s = model_info(model)
    _emit(s, as_json, format_info(s))


@app.command()
@_friendly
def demo(
    out: Annotated[
        Path, typer.Option("--out", help="Folder for everything the demo writes.")
    ] = Path("shotsmith-demo"),
    epochs: Annotated[
        int | None, typer.Option("--epochs", min=1, help="Training epochs (default 80).")
    ] = None,
    overwrite: OverwriteOpt = False,
    as_json: JsonOpt = False,
) -> None:
    """The whole job on the demo kit: ingest, train, generate, interpolate, vary, inspect."""
    from pipeline.demo_run import format_demo_summary, run_demo

    s = run_demo(out, epochs=epochs, overwrite=overwrite, progress=_show_progress(as_json))
    _emit(s, as_json, format_demo_summary(s))


@app.command()
@_friendly
def listen(
    folders: Annotated[
        list[Path], typer.Argument(help="Folders of rendered sounds (each with manifest.json).")
    ],
    bank: Annotated[
        Path | None,
        typer.Option("--bank", help="The bank the model learned from: categories, and the "
                     "nearest training sound of each rendered one to play."),
    ] = None,
    no_browser: Annotated[
        bool, typer.Option("--no-browser", help="Print the page's address; open no browser.")
    ] = False,
    port: Annotated[
        int, typer.Option("--port", min=0, max=65535, help="Port on 127.0.0.1 (0: any free one).")
    ] = 0,
) -> None:
    """Hear rendered sounds side by side in the browser and keep or reject them (picks.json)."""
    from pipeline.listen.server import serve

    s = serve(folders, bank=bank, port=port, open_browser=not no_browser, echo=typer.echo)
    saved = ", ".join(s["picks"]) if s["picks"] else "no marks were made"
    typer.echo(f"stopped: {s['kept']} kept, {s['rejected']} rejected; marks in {saved}")


@app.command()
@_friendly
def export(
    folders: Annotated[
        list[Path],
        typer.Argument(help="Folders of rendered sounds marked with 'shotsmith listen'."),
    ],
    out: Annotated[Path, typer.Option("--out", help="Kit folder: samples/, kit.json, KIT.sfz.")],
    include_all: Annotated[
        bool, typer.Option("--all", help="Export every sound, not only the kept ones.")
    ] = False,
    name: Annotated[
        str | None,
        typer.Option("--name", help="File name template, default {category}_{kind}_{n:02d}; "
                     "fields: category, kind, n, name, folder, seed, step, key."),
    ] = None,
    layout: Annotated[
        str,
        typer.Option("--layout", help="Key layout: gm (General MIDI drums), chromatic, octaves."),
    ] = "gm",
    bank: Annotated[
        Path | None, typer.Option("--bank", help="The bank the model learned from (categories).")
    ] = None,
    overwrite: OverwriteOpt = False,
    as_json: JsonOpt = False,
) -> None:
    """Copy the kept sounds into a kit folder with an SFZ instrument and a kit manifest."""
    from pipeline.kit import DEFAULT_TEMPLATE, export_kit
    from pipeline.kit_layout import LAYOUTS

    if layout not in LAYOUTS:
        raise typer.BadParameter(f"{layout!r} must be one of {', '.join(LAYOUTS)}",
                                 param_hint="--layout")
    s = export_kit(folders, out, include_all=include_all, name=name or DEFAULT_TEMPLATE,
                   layout=layout, bank=bank, overwrite=overwrite)
    _emit(s, as_json, f"wrote {s['sounds']} sounds on {s['keys']} keys ({s['layout']} layout): "
          f"{s['sfz']}, {s['manifest']}")


def main() -> None:
    """Console-script entry point."""
    app()


if __name__ == "__main__":
    main()
