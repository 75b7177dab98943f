"""New one-shots from a model file, written as WAVs with a manifest: generate, interpolate, vary.

Each command makes the same plan as its in-memory twin in :mod:`pipeline.sounds` (the
request as latent codes and per-sound metadata; new files numbered after those already in
the folder), then hands the decoded batches to the shared writer
(:func:`pipeline.render.render_spectra`: phase, finishing, WAVs, manifest). Every item
records its code, seed, sources and nearest training clip, so near-copies of the library
stand out.
"""

from __future__ import annotations

import csv
import sys
from collections.abc import Callable
from pathlib import Path
from typing import Any

import numpy as np

from pipeline.config import RenderSpec
from pipeline.errors import ShotsmithError
from pipeline.outputs import next_number, refuse_library
from pipeline.sounds import (  # noqa: F401 - re-exported: the planning half lives there
    MAX_SOUNDS,
    PATH_KINDS,
    PRIORS,
    Plan,
    Waypoint,
    check_count,
    check_generate,
    check_seed,
    check_sounds,
    decoded_batches,
    load,
    path_items,
    pick_seed,
    plan_generate,
    plan_interpolate,
    plan_vary,
    render_spec,
    resolve_sound,
)

if sys.version_info >= (3, 11):
    import tomllib
else:  # pragma: no cover
    import tomli as tomllib

_load, _seed, _path_items = load, pick_seed, path_items  # the names older callers use


def _numbering(out: Path, overwrite: bool) -> Callable[[str], int]:
    """New files start after the numbered ones already in ``out`` (from 0 with overwrite)."""
    return lambda stem: 0 if overwrite else next_number(out, stem)


def _render(
    mf,
    plan: Plan,
    out: Path,
    *,
    render: RenderSpec | None,
    overwrite: bool,
    progress: Callable[..., None] | None,
) -> dict[str, Any]:
    """Decode a plan in batches and write it through the shared renderer."""
    from pipeline.render import loudness_shortfall, render_spectra

    spec = render_spec(mf, render)
    refuse_library(out, option="--out", model=mf)
    written = render_spectra(
        decoded_batches(mf, plan, spec),
        out,
        mf.audio,
        spec,
        overwrite=overwrite,
        seed=plan.seed,
        progress=progress,
        total=len(plan.items),
        manifest_extra={
            "model": {"path": str(mf.path), "sha256": mf.sha256},
            "settings": mf.settings.replace(render=spec).to_dict(),
            "request": plan.request,
        },
    )
    ratios = [it["nearest"]["distance_ratio"] for it in written]
    return plan.request | {
        "loudness_unmet": loudness_shortfall(written, spec),
        "written": len(written),
        "out": str(out),
        "manifest": str(Path(out) / "manifest.json"),
        "min_distance_ratio": min(ratios) if ratios else None,
        "files": [it["file"] for it in written],
    }


def generate_sounds(
    model: Path,
    out: Path,
    *,
    n: int = 16,
    temperature: float = 1.0,
    near: str | None = None,
    seed: int | None = None,
    render: RenderSpec | None = None,
    overwrite: bool = False,
    progress: Callable[..., None] | None = None,
    prior: str = "fitted",
) -> dict[str, Any]:
    """``n`` new one-shots from where the library lives, or near one category of it.

    ``prior="fitted"`` (default) samples the kernel density fitted to the clips' codes
    (:mod:`pipeline.sampler`), with ``near`` that category's own; ``"mixture"`` a
    full-covariance mixture with components chosen by BIC (smoother, further from the
    clips); ``"normal"`` the VAE's prior N(0, T²I). ``temperature`` T scales the spread.
    """
    check_generate(n, prior, near)
    mf = load(model)
    plan = plan_generate(mf, n=n, temperature=temperature, near=near, seed=seed, prior=prior,
                         numbering=_numbering(out, overwrite))
    return _render(mf, plan, out, render=render, overwrite=overwrite, progress=progress)


def interpolate_sounds(
    model: Path,
    waypoints: list[str],
    out: Path,
    *,
    steps: int = 8,
    path: str = "slerp",
    seed: int | None = None,
    render: RenderSpec | None = None,
    overwrite: bool = False,
    progress: Callable[..., None] | None = None,
) -> dict[str, Any]:
    """``steps`` sounds along one continuous path through the waypoints (slerp, White 2016)."""
    mf = load(model)
    plan = plan_interpolate(mf, waypoints, steps=steps, path=path, seed=seed)
    return _render(mf, plan, out, render=render, overwrite=overwrite, progress=progress)


def read_jobs_file(path: Path) -> list[dict[str, Any]]:
    """Interpolation jobs from CSV or TOML (see the README for both layouts).

    CSV: a header with ``start`` and ``end``; optional ``via`` (waypoints split by ``|``),
    ``steps``, ``path`` and ``label``. TOML: ``[[job]]`` tables with ``sounds = [...]``
    and the same optional keys.
    """
    path = Path(path)
    try:
        text = path.read_text(encoding="utf-8-sig")
    except (OSError, UnicodeDecodeError) as exc:
        raise ShotsmithError(f"{path}: cannot read jobs file ({exc})") from None
    jobs: list[dict[str, Any]] = []
    if path.suffix.lower() == ".toml":
        try:
            data = tomllib.loads(text)
        except tomllib.TOMLDecodeError as exc:
            raise ShotsmithError(f"{path}: not valid TOML ({exc})") from None
        if not isinstance(data.get("job", []), list):
            raise ShotsmithError(f'{path}: jobs are [[job]] tables with sounds = ["A", "B", ...]')
        for k, job in enumerate(data.get("job", []), 1):
            if not isinstance(job, dict) or not isinstance(job.get("sounds"), list):
                raise ShotsmithError(f'{path}: job {k} needs sounds = ["A", "B", ...]')
            unknown = set(job) - {"sounds", "steps", "path", "label"}
            if unknown:
                raise ShotsmithError(f"{path}: job {k}: unknown key {sorted(unknown)[0]!r}")
            jobs.append({"where": f"{path}: job {k}", **job})
    elif path.suffix.lower() == ".csv":
        rows = csv.DictReader(text.splitlines())
        if not rows.fieldnames or not {"start", "end"} <= set(rows.fieldnames):
            raise ShotsmithError(f"{path}: the CSV header needs 'start' and 'end' columns")
        for line, row in enumerate(rows, 2):
            via = [v.strip() for v in (row.get("via") or "").split("|") if v.strip()]
            job: dict[str, Any] = {"where": f"{path}: line {line}"}
            job["sounds"] = [(row["start"] or "").strip(), *via, (row["end"] or "").strip()]
            for key in ("steps", "path", "label"):
                if (row.get(key) or "").strip():
                    job[key] = row[key].strip()
            if job["sounds"][0] == "" or job["sounds"][-1] == "":
                raise ShotsmithError(f"{path}: line {line}: needs a 'start' and an 'end' sound")
            jobs.append(job)
    else:
        raise ShotsmithError(f"{path}: jobs file must end in .csv or .toml")
    for job in jobs:
        if "steps" in job:
            job["steps"] = _job_steps(job["where"], job["steps"])
        for key in ("path", "label"):
            if key in job and not isinstance(job[key], str):
                raise ShotsmithError(f"{job['where']}: {key} {job[key]!r} must be text")
        if any(not isinstance(s, str) or not s for s in job["sounds"]) or len(job["sounds"]) < 2:
            raise ShotsmithError(f"{job['where']}: needs at least two sound names")
    if not jobs:
        raise ShotsmithError(f"{path}: no jobs found")
    return jobs


def _job_steps(where: str, value: Any) -> int:
    """A job's ``steps``: a whole number (TOML integer or CSV digits), 2 to MAX_SOUNDS; a
    fraction is refused in both layouts rather than cut to a whole number."""
    if isinstance(value, str) and value.strip().isascii() and value.strip().isdigit():
        value = int(value)
    if isinstance(value, bool) or not isinstance(value, int):
        raise ShotsmithError(f"{where}: steps {value!r} is not a whole number")
    if not 2 <= value <= MAX_SOUNDS:
        raise ShotsmithError(f"{where}: steps {value} must be between 2 and {MAX_SOUNDS}")
    return value


def interpolate_jobs(
    model: Path,
    jobs_file: Path,
    out: Path,
    *,
    steps: int = 8,
    path: str = "slerp",
    seed: int | None = None,
    render: RenderSpec | None = None,
    overwrite: bool = False,
    progress: Callable[..., None] | None = None,
) -> dict[str, Any]:
    """Many interpolations from one jobs file, rendered into one folder with one manifest."""
    jobs, seed = read_jobs_file(jobs_file), pick_seed(seed)
    check_sounds(steps, "steps", low=2)
    total = sum(job.get("steps", steps) for job in jobs)
    if total > MAX_SOUNDS:
        raise ShotsmithError(f"{jobs_file}: {len(jobs)} jobs of {total} sounds in all; at most "
                             f"{MAX_SOUNDS} per run (split the file)")
    mf = load(model)
    codes, items = [], []
    for job in jobs:
        try:
            points = [resolve_sound(mf, s) for s in job["sounds"]]
            label = job.get("label") or None
            Z, its = path_items(
                points, job.get("steps", steps), job.get("path", path), seed + len(items), label
            )
        except ShotsmithError as exc:
            raise ShotsmithError(f"{job['where']}: {exc}") from None
        codes.append(Z)
        items.extend(its)
    request = {
        "command": "interpolate",
        "jobs_file": str(jobs_file),
        "jobs": len(jobs),
        "seed": seed,
    }
    plan = Plan(np.concatenate(codes), items, request, seed)
    return _render(mf, plan, out, render=render, overwrite=overwrite, progress=progress)


def vary_sound(
    model: Path,
    sound: str,
    out: Path,
    *,
    n: int = 8,
    amount: float = 1.0,
    seed: int | None = None,
    render: RenderSpec | None = None,
    overwrite: bool = False,
    progress: Callable[..., None] | None = None,
) -> dict[str, Any]:
    """``n`` variations around one sound's posterior; ``amount=0`` gives its reconstruction."""
    check_count(n)
    mf = load(model)
    plan = plan_vary(mf, sound, n=n, amount=amount, seed=seed,
                     numbering=_numbering(out, overwrite))
    return _render(mf, plan, out, render=render, overwrite=overwrite, progress=progress)
