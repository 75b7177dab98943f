"""New one-shots in memory: generate, interpolate, vary without writing a file.

Each request becomes a batch of latent codes and one metadata dict per sound (the
``plan_*`` functions; pure apart from encoding an audio-file waypoint), the codes are
decoded in batches and rendered (:func:`pipeline.render.finish_batches`). The
file-writing commands in :mod:`pipeline.create` make the same plans and hand the same
batches to :func:`pipeline.render.render_spectra`, so a script and the CLI get the
same sounds for the same seed::

    import pipeline
    s = pipeline.generate("model.pt", n=4, seed=1)
    s.audio[0], s.sample_rate, s.items[0]["nearest"]
"""

from __future__ import annotations

import dataclasses
import secrets
from collections.abc import Callable, Iterator, Sequence
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np

from pipeline import latent, spectra
from pipeline.config import RenderSpec
from pipeline.errors import ParameterError
from pipeline.outputs import numbered
from pipeline.sampler import draw_codes, fit_mixture, sample_mixture

PATH_KINDS = ("slerp", "lerp")
PRIORS = ("fitted", "mixture", "normal")  # generate: kernels at the codes, a BIC mixture, N(0, I)
Numbering = Callable[[str], int]  # a stem to the first number of its batch


@dataclass(frozen=True)
class Waypoint:
    """A resolved sound: its latent posterior and a label for file names."""

    label: str
    mu: np.ndarray
    logvar: np.ndarray
    source: dict[str, Any]


@dataclass
class Sounds:
    """Rendered sounds in memory. Unpacks as ``audio, sample_rate, items = sounds``.

    ``audio``: one float32 array per item (finished: DC, fades, normalised; not
    quantised). ``items``: what a manifest records of each (``kind``, ``z``, ``seed``,
    ``sources``, ``nearest``, ``sc_db``, ``peak_dbfs``...; a failed one has ``reason`` and
    no audio). ``codes``: the latent codes, one row per item. ``request``: the call.
    """

    audio: list[np.ndarray]
    sample_rate: int
    items: list[dict[str, Any]]
    codes: np.ndarray
    request: dict[str, Any]

    def __iter__(self) -> Iterator[Any]:
        return iter((self.audio, self.sample_rate, self.items))

    def __len__(self) -> int:
        return len(self.audio)


@dataclass
class Plan:
    """A request as codes and per-sound metadata, before decoding."""

    codes: np.ndarray
    items: list[dict[str, Any]]
    request: dict[str, Any]
    seed: int


def load(model):
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


def pick_seed(seed: int | None) -> int:
    return int(secrets.randbits(31)) if seed is None else check_seed(seed)


def _from_zero(stem: str) -> int:
    return 0


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
    older = ("; this model file holds no library paths (trained before they were stored): "
             "name the clip" if not paths and "/" in text.replace("\\", "/") else "")
    raise ParameterError(
        f"{text!r} is neither a clip in the model nor an audio file "
        f"(clips look like {', '.join(names[:3])} ...{older})"
    )


def check_generate(n: int, prior: str, near: str | None) -> None:
    """The request's own checks, before a model is loaded."""
    check_sounds(n, "n")
    if prior not in PRIORS:
        raise ParameterError(f"prior={prior!r} must be one of {', '.join(PRIORS)}")
    if prior != "fitted" and near is not None:
        raise ParameterError(f"near= samples the category's fitted kernels; it does not "
                             f"combine with prior={prior!r}")


def check_count(n: int) -> None:
    check_sounds(n, "n")


def plan_generate(mf, *, n: int = 16, temperature: float = 1.0, near: str | None = None,
                  seed: int | None = None, prior: str = "fitted",
                  numbering: Numbering = _from_zero) -> Plan:
    """``n`` codes from the kernels fitted to the clips' codes (``near``: one category's),
    from a mixture with components chosen by BIC (``prior="mixture"``), or from N(0, T²I)
    (``prior="normal"``)."""
    check_generate(n, prior, near)
    latent.check_spread(temperature, "temperature")
    seed = pick_seed(seed)
    rng = np.random.default_rng(seed)
    sources: list[str] = [] if near is None else [f"category:{near}"]
    if prior == "normal":
        Z = latent.sample_prior(n, mf.mu.shape[1], temperature=temperature, rng=rng)
    elif prior == "mixture":
        Z = sample_mixture(fit_mixture(mf.mu, seed=0), n, temperature=temperature, rng=rng)
    else:
        Z = draw_codes(*mf.samplers(), n, near=near, temperature=temperature, rng=rng)
    items = [
        {"stem": "generate", "suffix": suffix, "kind": "generate", "seed": seed + i,
         "sources": sources}
        for i, suffix in enumerate(numbered(numbering("generate"), n, width=4))
    ]
    request = {"command": "generate", "n": n, "temperature": temperature, "near": near,
               "prior": prior, "seed": seed}
    return Plan(Z, items, request, seed)


def path_items(
    points: Sequence[Waypoint], steps: int, kind: str, seed: int, label: str | None = None
) -> tuple[np.ndarray, list[dict[str, Any]]]:
    """Codes along one path through ``points`` and an item per step."""
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


def plan_interpolate(mf, waypoints: Sequence[str], *, steps: int = 8, path: str = "slerp",
                     seed: int | None = None) -> Plan:
    """``steps`` codes along one continuous path through the waypoints (slerp, White 2016)."""
    seed = pick_seed(seed)
    points = [resolve_sound(mf, w) for w in waypoints]
    Z, items = path_items(points, steps, path, seed)
    request = {"command": "interpolate", "waypoints": list(waypoints), "steps": steps,
               "path": path, "seed": seed}
    return Plan(Z, items, request, seed)


def plan_vary(mf, sound: str, *, n: int = 8, amount: float = 1.0, seed: int | None = None,
              numbering: Numbering = _from_zero) -> Plan:
    """``n`` codes around one sound's posterior; ``amount=0`` gives its reconstruction."""
    check_count(n)
    latent.check_spread(amount, "amount")
    seed = pick_seed(seed)
    point = resolve_sound(mf, sound)
    Z = latent.variations(point.mu, point.logvar, n, amount=amount, rng=np.random.default_rng(seed))
    src = [point.source.get("clip") or point.source.get("file")]
    label = f"vary-{point.label}"
    items = [
        {"stem": label, "suffix": suffix, "kind": "vary", "seed": seed + i, "sources": src,
         "amount": amount}
        for i, suffix in enumerate(numbered(numbering(label), n, width=2))
    ]
    request = {"command": "vary", "sound": sound, "n": n, "amount": amount, "seed": seed}
    return Plan(Z, items, request, seed)


def render_spec(mf, render: RenderSpec | None) -> RenderSpec:
    """``render``, checked, or the model's own render settings."""
    if render is not None and not isinstance(render, RenderSpec):
        raise ParameterError("render must be a RenderSpec (e.g. mf.settings.render or "
                             "settings.with_overrides({'render': {...}}).render), or None")
    return render or mf.settings.render


def decode_for_render(mf, codes: np.ndarray, render: RenderSpec) -> np.ndarray:
    """Codes to [0, 1] spectra as every command renders them: decoded, then bins below
    ``render.gate_db`` silenced (:func:`pipeline.spectra.gate_quiet_bins`)."""
    return spectra.gate_quiet_bins(mf.decode(codes), mf.audio, render.gate_db)


def decoded_batches(mf, plan: Plan, render: RenderSpec
                    ) -> Iterator[tuple[np.ndarray, list[dict[str, Any]]]]:
    """The plan's codes through :func:`decode_for_render`, ``render.batch_size`` at a time,
    each item given its code and its nearest training clip (distance also relative to the
    clips' typical spacing)."""
    idx, dist = latent.nearest_codes(plan.codes, mf.mu)
    spacing = max(latent.typical_spacing(mf.mu), 1e-12)
    for item, z, i, d in zip(plan.items, plan.codes, idx, dist):
        item["z"] = [round(float(v), 6) for v in z]
        item["nearest"] = {"name": mf.clip_names[i], "distance": float(d),
                           "distance_ratio": float(d / spacing)}
    for start in range(0, len(plan.items), render.batch_size):
        stop = start + render.batch_size
        yield decode_for_render(mf, plan.codes[start:stop], render), plan.items[start:stop]


def render_plan(mf, plan: Plan, render: RenderSpec | None = None, *,
                progress: Callable[..., None] | None = None) -> Sounds:
    """Decode and render a plan in memory: finished float32 clips, not quantised."""
    from pipeline.render import finish_batches

    spec = dataclasses.replace(render_spec(mf, render), bit_depth="32f")  # no quantisation
    audio, items, done = [], [], 0
    for batch in finish_batches(decoded_batches(mf, plan, spec), mf.audio, spec,
                                seed=plan.seed):
        for f in batch:
            audio.append(f.audio)
            items.append(f.meta if f.audio is not None else f.meta | {"reason": f.reason})
        done += len(batch)
        if progress is not None:
            progress(done, len(plan.items))
    return Sounds(audio, spec.output_rate or mf.audio.sample_rate, items, plan.codes,
                  plan.request)


def generate(model, *, n: int = 16, temperature: float = 1.0, near: str | None = None,
             seed: int | None = None, prior: str = "fitted", render: RenderSpec | None = None,
             progress: Callable[..., None] | None = None) -> Sounds:
    """``n`` new one-shots in memory (see :func:`pipeline.create.generate_sounds`)."""
    check_generate(n, prior, near)
    mf = load(model)
    plan = plan_generate(mf, n=n, temperature=temperature, near=near, seed=seed, prior=prior)
    return render_plan(mf, plan, render, progress=progress)


def interpolate(model, waypoints: Sequence[str], *, steps: int = 8, path: str = "slerp",
                seed: int | None = None, render: RenderSpec | None = None,
                progress: Callable[..., None] | None = None) -> Sounds:
    """``steps`` sounds along a latent path through the waypoints, in memory."""
    mf = load(model)
    plan = plan_interpolate(mf, waypoints, steps=steps, path=path, seed=seed)
    return render_plan(mf, plan, render, progress=progress)


def vary(model, sound: str, *, n: int = 8, amount: float = 1.0, seed: int | None = None,
         render: RenderSpec | None = None, progress: Callable[..., None] | None = None
         ) -> Sounds:
    """``n`` variations around one sound, in memory."""
    check_count(n)
    mf = load(model)
    plan = plan_vary(mf, sound, n=n, amount=amount, seed=seed)
    return render_plan(mf, plan, render, progress=progress)
