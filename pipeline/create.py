"""New one-shots from a model file: generate, interpolate, vary.

Each command turns its request into a batch of latent codes (pure functions in
:mod:`pipeline.latent`), then the shared path decodes them in batches, runs the
batched fast Griffin-Lim, finishes and writes WAVs with a manifest
(:func:`pipeline.render.render_spectra`). Every item records its code, seed,
sources and nearest training clip, so near-copies of the library stand out.
"""

from __future__ import annotations

import csv
import secrets
import sys
from collections.abc import Callable, Iterator, Sequence
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np

from pipeline import latent
from pipeline.config import RenderSpec
from pipeline.errors import ParameterError, ShotsmithError
from pipeline.outputs import next_number, numbered, refuse_library
from pipeline.sampler import draw_codes

if sys.version_info >= (3, 11):
    import tomllib
else:  # pragma: no cover
    import tomli as tomllib

PATH_KINDS = ("slerp", "lerp")
PRIORS = ("fitted", "normal")  # generate: the mixture fitted to the codes, or N(0, I)


@dataclass(frozen=True)
class Waypoint:
    """A resolved sound: its latent posterior and a label for file names."""

    label: str
    mu: np.ndarray
    logvar: np.ndarray
    source: dict[str, Any]


def _load(model):
    """A loaded :class:`~pipeline.modelfile.ModelFile` as it is, or the model file at a path."""
    from pipeline.modelfile import ModelFile, load_model_file  # torch: only when generating

    return model if isinstance(model, ModelFile) else load_model_file(model)


# At most this many sounds per request (generate -n, vary -n, interpolate --steps, a jobs
# file in all): every item's code and record are held while its batches render; a larger
# set is made by running again into the same folder.
MAX_SOUNDS = 100_000
MAX_SEED = 2**32 - 1  # numpy and torch both take it; -1 and 2**64 they refuse


def check_seed(seed: Any) -> int:
    """A seed as an int in [0, MAX_SEED], or a ParameterError naming it."""
    if isinstance(seed, bool) or not isinstance(seed, (int, np.integer)) \
            or not 0 <= seed <= MAX_SEED:
        raise ParameterError(f"seed={seed!r} must be a whole number between 0 and {MAX_SEED}")
    return int(seed)


def check_sounds(n: Any, name: str, *, low: int = 1) -> int:
    """A count of sounds to render, between ``low`` and :data:`MAX_SOUNDS`."""
    if isinstance(n, bool) or not isinstance(n, (int, np.integer)) \
            or not low <= n <= MAX_SOUNDS:
        raise ParameterError(f"{name}={n!r} must be a whole number between {low} and "
                             f"{MAX_SOUNDS} (render more by running again into the folder)")
    return int(n)


def _seed(seed: int | None) -> int:
    return int(secrets.randbits(31)) if seed is None else check_seed(seed)


def resolve_sound(mf, text: str) -> Waypoint:
    """A clip from the model (exact name, relative path or unique prefix), or an audio file."""
    names = list(mf.clip_names)
    paths = list(getattr(mf, "clip_paths", None) or [])
    hits = [i for i, n in enumerate(names) if n == text]
    if not hits and paths:
        stripped = text.replace("\\", "/")
        hits = [i for i, p in enumerate(paths) if p == stripped or p.rsplit(".", 1)[0] == stripped]
    if not hits:
        hits = [i for i, n in enumerate(names) if n.startswith(text)]
    if len(hits) == 1:
        i = hits[0]
        return Waypoint(names[i], mf.mu[i], mf.logvar[i], {"clip": names[i]})
    if len(hits) > 1:
        shown = ", ".join(names[i] for i in hits[:12]) + (" ..." if len(hits) > 12 else "")
        raise ParameterError(f"{text!r} matches {len(hits)} clips: {shown}; give more of the name")
    path = Path(text)
    if path.is_file():
        from pipeline.ingest import load_clip
        from pipeline.spectra import clip_to_unit

        y = load_clip(path, mf.audio)
        mu, logvar = mf.encode(clip_to_unit(y, mf.audio)[None])
        return Waypoint(path.stem, mu[0], logvar[0], {"file": str(path)})
    raise ParameterError(
        f"{text!r} is neither a clip in the model nor an audio file "
        f"(clips look like {', '.join(names[:3])} ...)"
    )


def _nearest(mf, Z: np.ndarray) -> list[dict[str, Any]]:
    idx, dist = latent.nearest_codes(Z, mf.mu)
    spacing = max(latent.typical_spacing(mf.mu), 1e-12)
    return [
        {"name": mf.clip_names[i], "distance": float(d), "distance_ratio": float(d / spacing)}
        for i, d in zip(idx, dist)
    ]


def _render(
    mf,
    Z: np.ndarray,
    items: list[dict[str, Any]],
    out: Path,
    *,
    seed: int,
    render: RenderSpec | None,
    overwrite: bool,
    progress: Callable[..., None] | None,
    summary: dict[str, Any],
) -> dict[str, Any]:
    """Decode codes in batches and hand them to the shared renderer."""
    from pipeline.render import render_spectra

    if render is not None and not isinstance(render, RenderSpec):
        raise ParameterError("render must be a RenderSpec (e.g. mf.settings.render or "
                             "settings.with_overrides({'render': {...}}).render), or None")
    refuse_library(out, option="--out", model=mf)
    render_spec = render or mf.settings.render
    settings = mf.settings.replace(render=render_spec)
    for item, z, near in zip(items, Z, _nearest(mf, Z)):
        item["z"] = [round(float(v), 6) for v in z]
        item["nearest"] = near
    bs = render_spec.batch_size

    def batches() -> Iterator[tuple[np.ndarray, list[dict[str, Any]]]]:
        for start in range(0, len(items), bs):
            yield mf.decode(Z[start : start + bs]), items[start : start + bs]

    written = render_spectra(
        batches(),
        out,
        mf.audio,
        render_spec,
        overwrite=overwrite,
        seed=seed,
        progress=progress,
        total=len(items),
        manifest_extra={
            "model": {"path": str(mf.path), "sha256": mf.sha256},
            "settings": settings.to_dict(),
            "request": summary,
        },
    )
    ratios = [it["nearest"]["distance_ratio"] for it in written]
    return summary | {
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

    ``prior="fitted"`` (default) samples the Gaussian mixture fitted to the clips' codes
    (:mod:`pipeline.sampler`), with ``near`` that category's own mixture; ``"normal"``
    samples the VAE's prior N(0, T²I). ``temperature`` T scales the spread.
    """
    n, seed = check_sounds(n, "n"), _seed(seed)
    latent.check_spread(temperature, "temperature")
    if prior not in PRIORS:
        raise ParameterError(f"prior={prior!r} must be one of {', '.join(PRIORS)}")
    if prior == "normal" and near is not None:
        raise ParameterError("near= samples the category's fitted mixture; it does not "
                             "combine with prior='normal'")
    mf = _load(model)
    rng = np.random.default_rng(seed)
    sources: list[str] = [] if near is None else [f"category:{near}"]
    if prior == "normal":
        Z = latent.sample_prior(n, mf.mu.shape[1], temperature=temperature, rng=rng)
    else:
        Z = draw_codes(*mf.samplers(), n, near=near, temperature=temperature, rng=rng)
    start = 0 if overwrite else next_number(out, "generate")  # add after what is there
    items = [
        {"stem": "generate", "suffix": suffix, "kind": "generate", "seed": seed + i,
         "sources": sources}
        for i, suffix in enumerate(numbered(start, n, width=4))
    ]
    request = {
        "command": "generate",
        "n": n,
        "temperature": temperature,
        "near": near,
        "prior": prior,
        "seed": seed,
    }
    return _render(
        mf,
        Z,
        items,
        out,
        seed=seed,
        render=render,
        overwrite=overwrite,
        progress=progress,
        summary=request,
    )


def _path_items(
    points: Sequence[Waypoint], steps: int, kind: str, seed: int, label: str | None = None
) -> tuple[np.ndarray, list[dict[str, Any]]]:
    if kind not in PATH_KINDS:
        raise ParameterError(f"path={kind!r} must be slerp or lerp")
    if len(points) < 2:
        raise ParameterError("an interpolation needs at least two sounds")
    steps = check_sounds(steps, "steps", low=2)
    Z = latent.latent_path(np.stack([p.mu for p in points]), steps, kind=kind)
    stem = label or "interpolate-" + "-to-".join(p.label for p in points)
    sources = [p.source.get("clip") or p.source.get("file") for p in points]
    items = [
        {
            "stem": stem,
            "suffix": suffix,  # the step: never cut from a long name, so files sort in order
            "kind": "interpolate",
            "seed": seed + i,
            "sources": sources,
            "path": kind,
            "step": i,
        }
        for i, suffix in enumerate(numbered(0, steps, width=2))
    ]
    return Z, items


def interpolate_sounds(
    model: Path,
    waypoints: Sequence[str],
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
    steps, seed = check_sounds(steps, "steps", low=2), _seed(seed)
    mf = _load(model)
    points = [resolve_sound(mf, w) for w in waypoints]
    Z, items = _path_items(points, steps, path, seed)
    request = {
        "command": "interpolate",
        "waypoints": list(waypoints),
        "steps": steps,
        "path": path,
        "seed": seed,
    }
    return _render(
        mf,
        Z,
        items,
        out,
        seed=seed,
        render=render,
        overwrite=overwrite,
        progress=progress,
        summary=request,
    )


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
    jobs, seed = read_jobs_file(jobs_file), _seed(seed)
    check_sounds(steps, "steps", low=2)
    total = sum(job.get("steps", steps) for job in jobs)
    if total > MAX_SOUNDS:
        raise ShotsmithError(f"{jobs_file}: {len(jobs)} jobs of {total} sounds in all; at most "
                             f"{MAX_SOUNDS} per run (split the file)")
    mf = _load(model)
    codes, items = [], []
    for job in jobs:
        try:
            points = [resolve_sound(mf, s) for s in job["sounds"]]
            label = job.get("label") or None
            Z, its = _path_items(
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
    return _render(
        mf,
        np.concatenate(codes),
        items,
        out,
        seed=seed,
        render=render,
        overwrite=overwrite,
        progress=progress,
        summary=request,
    )


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
    n, seed = check_sounds(n, "n"), _seed(seed)
    amount = latent.check_spread(amount, "amount")
    mf = _load(model)
    point = resolve_sound(mf, sound)
    Z = latent.variations(point.mu, point.logvar, n, amount=amount, rng=np.random.default_rng(seed))
    src = [point.source.get("clip") or point.source.get("file")]
    label = f"vary-{point.label}"
    start = 0 if overwrite else next_number(out, label)  # add after what is there
    items = [
        {
            "stem": label,
            "suffix": suffix,
            "kind": "vary",
            "seed": seed + i,
            "sources": src,
            "amount": amount,
        }
        for i, suffix in enumerate(numbered(start, n, width=2))
    ]
    request = {"command": "vary", "sound": sound, "n": n, "amount": amount, "seed": seed}
    return _render(
        mf,
        Z,
        items,
        out,
        seed=seed,
        render=render,
        overwrite=overwrite,
        progress=progress,
        summary=request,
    )
