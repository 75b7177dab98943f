"""Settings: frozen dataclasses per stage, TOML presets, CLI overrides, validation.

A preset is a TOML file with one table per spec (``[audio]``, ``[model]``,
``[train]``, ``[render]``). Unknown tables or keys and out-of-range values are
rejected with a :class:`~pipeline.errors.PresetError` naming ``table.key``.
The resolved settings are stored in the bank, the model file and every manifest.
"""

from __future__ import annotations

import dataclasses
import difflib
import math
import sys
import typing
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

from pipeline.errors import PresetError

if sys.version_info >= (3, 11):
    import tomllib
else:  # pragma: no cover
    import tomli as tomllib

BIT_DEPTHS = ("16", "24", "32f")
PHASE_INITS = ("pghi", "random", "zeros")
DECODER_VARIANCES = ("fixed", "calibrated")


def available_cores() -> int:
    """The cores this process may run on (affinity and cgroup quota): the default for ``--jobs``."""
    from pipeline.runtime import available_cores as cores

    return cores()


def _fail(where: str, msg: str) -> None:
    raise PresetError(f"{where}: {msg}", key=where if "." in where else None)


# Every numeric setting: its lower and upper bound (inclusive) and unit. A value outside them,
# or one that is not finite (TOML has nan and inf), is refused naming the key, in presets and
# in the settings stored in banks, model files and manifests alike. Checks between keys
# (hop_length divides n_fft, db_floor below db_ceiling) stay in each spec.
LIMITS: dict[str, tuple[float, float, str]] = {
    "audio.sample_rate": (4000, 192000, " Hz"), "audio.duration": (0.05, 30.0, " seconds"),
    "audio.n_fft": (64, 65536, " samples"), "audio.hop_length": (1, 65536, " samples"),
    "audio.db_floor": (-300.0, 0.0, " dB"), "audio.db_ceiling": (-200.0, 60.0, " dB"),
    "audio.peak_db": (-60.0, 0.0, " dBFS"), "audio.silence_db": (-200.0, 0.0, " dBFS"),
    "audio.onset_db": (-200.0, 0.0, " dB"), "audio.preroll_ms": (0.0, 1000.0, " ms"),
    "audio.fade_ms": (0.0, 10000.0, " ms"), "audio.min_ms": (0.0, 10000.0, " ms"),
    "model.latent_dim": (1, 512, ""), "model.width": (8, 4096, ""), "model.depth": (1, 8, ""),
    "model.kernel_size": (1, 63, ""),
    "train.epochs": (1, 1_000_000, ""), "train.batch_size": (1, 65536, ""),
    "train.learning_rate": (0.0, 1.0, ""), "train.weight_decay": (0.0, 10.0, ""),
    "train.lr_warmup_epochs": (0, 1_000_000, ""), "train.min_lr_ratio": (0.0, 1.0, ""),
    "train.beta": (0.0, 1000.0, ""), "train.kl_warmup_epochs": (0, 1_000_000, ""),
    "train.free_bits": (0.0, 100.0, " nats"), "train.loud_weight": (0.0, 100.0, ""),
    "train.val_fraction": (0.0, 0.9, ""), "train.patience": (1, 1_000_000, ""),
    "train.seed": (0, 2**32 - 1, ""),
    "render.iterations": (0, 10000, ""), "render.momentum": (0.0, 1.5, ""),
    "render.peak_db": (-60.0, 0.0, " dBTP"), "render.loudness": (-70.0, 0.0, " LUFS"),
    "render.fade_in_ms": (0.0, 10000.0, " ms"), "render.fade_out_ms": (0.0, 10000.0, " ms"),
    "render.batch_size": (1, 4096, ""), "render.output_rate": (8000, 192000, " Hz"),
    "render.gate_db": (-300.0, 0.0, " dB"),
}


# Spectrogram cells (bins x frames) per clip: 8x the long preset's; beyond it one clip's
# spectrum alone takes many megabytes and a bank or a batch runs out of memory.
MAX_CELLS = 1 << 21


def _check_limits(spec: Any, table: str) -> None:
    """Every numeric field of ``spec`` finite and within :data:`LIMITS`."""
    for f in dataclasses.fields(spec):
        where, value = f"{table}.{f.name}", getattr(spec, f.name)
        if where not in LIMITS or value is None or isinstance(value, bool):
            continue
        if not isinstance(value, (int, float)):
            continue  # the type check names it (settings built from a mapping)
        lo, hi, unit = LIMITS[where]
        span = f"between {lo:g} and {hi:g}{unit}" if isinstance(lo, float) else \
            f"between {lo} and {hi}{unit}"
        if not math.isfinite(value):
            _fail(where, f"{value} must be a finite number ({span})")
        if not lo <= value <= hi:
            _fail(where, f"{value} must be {span}")


@dataclass(frozen=True)
class AudioSpec:
    """The audio front end and the spectrogram scale; fixes the model's input shape."""

    sample_rate: int = 44100
    duration: float = 1.0  # seconds every clip is fitted to
    n_fft: int = 2048
    hop_length: int = 512  # n_fft / 4: Hann COLA/NOLA
    window: str = "hann"
    db_floor: float = -100.0  # absolute dB scale mapped to [0, 1]
    db_ceiling: float = 0.0  # 0 dB = a full-scale bin-centred sine
    peak_db: float = -1.0  # each clip's peak before analysis (dBFS)
    silence_db: float = -70.0  # a file whose peak is below this is "silent" (dBFS)
    onset_db: float = -50.0  # onset = first sample above peak + onset_db
    preroll_ms: float = 5.0  # audio kept before the onset
    fade_ms: float = 15.0  # fade-out at the crop point
    min_ms: float = 5.0  # shorter files are rejected
    spectra_dtype: str = "float16"

    def __post_init__(self) -> None:
        _check_limits(self, "audio")
        w = "audio"
        if self.n_fft < 64 or self.n_fft % 2:
            _fail(f"{w}.n_fft", f"{self.n_fft} must be an even number of at least 64")
        if self.hop_length < 1 or self.n_fft % self.hop_length or self.n_fft // self.hop_length < 2:
            _fail(
                f"{w}.hop_length",
                f"{self.hop_length} must divide n_fft={self.n_fft} at least twice",
            )
        if self.window != "hann":
            _fail(f"{w}.window", f"{self.window!r} is not supported (only 'hann')")
        if not self.db_floor < self.db_ceiling:
            _fail(f"{w}.db_floor", f"{self.db_floor} must be below db_ceiling={self.db_ceiling}")
        if self.peak_db > 0:
            _fail(f"{w}.peak_db", f"{self.peak_db} must be at most 0 dBFS")
        if self.onset_db >= 0 or self.silence_db >= 0:
            _fail(f"{w}.onset_db", "onset_db and silence_db must be negative")
        if self.preroll_ms < 0 or self.fade_ms < 0 or self.min_ms < 0:
            _fail(f"{w}.preroll_ms", "preroll_ms, fade_ms and min_ms must not be negative")
        if self.spectra_dtype not in ("float16", "float32"):
            _fail(f"{w}.spectra_dtype", f"{self.spectra_dtype!r} must be 'float16' or 'float32'")
        if self.n_samples < self.n_fft:
            _fail(
                f"{w}.duration", f"{self.duration} s is shorter than one n_fft={self.n_fft} window"
            )
        if self.n_bins * self.n_frames > MAX_CELLS:
            _fail(f"{w}.hop_length", f"{self.n_bins} bins x {self.n_frames} frames per clip is "
                  f"more than {MAX_CELLS:,} (a longer hop, a shorter n_fft or duration)")

    @property
    def n_samples(self) -> int:
        return int(round(self.duration * self.sample_rate))

    @property
    def n_bins(self) -> int:
        return self.n_fft // 2 + 1

    @property
    def analysis_pad(self) -> int:
        """Silence put before every clip for analysis, trimmed after reconstruction.

        At least n_fft / 2 (a whole number of hops): the attack then sits in frames whose
        windows lie inside the signal, where phase reconstruction from magnitudes works
        (measured: PGHI + 32 fast Griffin-Lim iterations on real hits, about 3 dB lower
        spectral convergence than with the attack in the half-padded first frame).
        """
        return -(-(self.n_fft // 2) // self.hop_length) * self.hop_length

    @property
    def n_frames(self) -> int:
        # centred frames (librosa center=True) of the padded clip: 1 + len // hop
        return 1 + (self.n_samples + self.analysis_pad) // self.hop_length


@dataclass(frozen=True)
class ModelSpec:
    """Network size. Input shape comes from the AudioSpec."""

    latent_dim: int = 16
    width: int = 128  # channels of every time-convolution (the bins are the input channels)
    depth: int = 3  # stride-2 time-convolutions in the encoder (mirrored in the decoder)
    kernel_size: int = 5

    def __post_init__(self) -> None:
        _check_limits(self, "model")
        if self.kernel_size < 1 or self.kernel_size % 2 == 0:
            _fail("model.kernel_size", f"{self.kernel_size} must be a positive odd number")


@dataclass(frozen=True)
class TrainSpec:
    """The optimiser, the schedule and the VAE objective."""

    epochs: int = 200
    batch_size: int = 32
    learning_rate: float = 2e-3
    weight_decay: float = 1e-4
    lr_warmup_epochs: int = 3
    min_lr_ratio: float = 0.05  # cosine decay ends at learning_rate * min_lr_ratio
    beta: float = 1.0  # weight of the KL term
    kl_warmup_epochs: int = 20  # KL weight rises linearly from 0 to beta (Bowman et al. 2016)
    free_bits: float = 0.0  # nats per latent dimension (Kingma et al. 2016); 0 = off
    loud_weight: float = 3.0  # reconstruction weight 1 + loud_weight * level: loud parts count more
    decoder_variance: str = "fixed"  # "calibrated": learned from the fit (Rybkin et al. 2021)
    val_fraction: float = 0.15
    patience: int = 30  # epochs without validation improvement before stopping
    seed: int = 0

    def __post_init__(self) -> None:
        _check_limits(self, "train")
        if self.epochs < 1:
            _fail("train.epochs", f"{self.epochs} must be at least 1")
        if self.batch_size < 1:
            _fail("train.batch_size", f"{self.batch_size} must be at least 1")
        if not 0 < self.learning_rate < 1:
            _fail("train.learning_rate", f"{self.learning_rate} must be between 0 and 1")
        for key in ("weight_decay", "beta", "free_bits"):
            if getattr(self, key) < 0:
                _fail(f"train.{key}", f"{getattr(self, key)} must not be negative")
        if self.decoder_variance not in DECODER_VARIANCES:
            _fail("train.decoder_variance",
                  f"{self.decoder_variance!r} must be one of {', '.join(DECODER_VARIANCES)}")
        if self.lr_warmup_epochs < 0 or self.kl_warmup_epochs < 0 or self.patience < 1:
            _fail("train.patience", "warm-up epochs must be >= 0 and patience >= 1")
        if not 0 < self.min_lr_ratio <= 1:
            _fail("train.min_lr_ratio", f"{self.min_lr_ratio} must be in (0, 1]")
        if not 0 <= self.val_fraction < 0.9:
            _fail("train.val_fraction", f"{self.val_fraction} must be in [0, 0.9)")


@dataclass(frozen=True)
class RenderSpec:
    """Phase reconstruction and WAV writing, shared by every command that writes audio."""

    iterations: int = 64  # fast Griffin-Lim iterations
    momentum: float = 0.99  # Perraudin et al. 2013
    phase_init: str = "pghi"  # Průša et al. 2017; "random" (seeded) or "zeros"
    bit_depth: str = "24"
    peak_db: float = -1.0  # true-peak ceiling, dBTP (EBU R 128: -1 dBTP)
    loudness: float | None = None  # integrated loudness target, LUFS (BS.1770); None = peak only
    fade_in_ms: float = 1.0
    fade_out_ms: float = 20.0  # fade to digital silence where the sound ends
    batch_size: int = 32  # clips decoded and phase-reconstructed together
    trim: bool = False  # write each file only until its sound ends
    output_rate: int | None = None  # WAV sample rate (soxr after reconstruction); None = analysis
    # decoded bins quieter than this (dB, the spectrogram's scale) are silence before phase
    # reconstruction (resynth renders real magnitudes untouched); at or below audio.db_floor
    # it does nothing (see spectra.gate_quiet_bins)
    gate_db: float = -99.0

    def __post_init__(self) -> None:
        _check_limits(self, "render")
        if self.phase_init not in PHASE_INITS:
            _fail(
                "render.phase_init", f"{self.phase_init!r} must be one of {', '.join(PHASE_INITS)}"
            )
        if self.bit_depth not in BIT_DEPTHS:
            _fail("render.bit_depth", f"{self.bit_depth!r} must be one of {', '.join(BIT_DEPTHS)}")
        if self.fade_in_ms < 0 or self.fade_out_ms < 0:
            _fail("render.fade_in_ms", "fades must not be negative")
        if self.batch_size < 1:
            _fail("render.batch_size", f"{self.batch_size} must be at least 1")


SPEC_TYPES: dict[str, type] = {
    "audio": AudioSpec,
    "model": ModelSpec,
    "train": TrainSpec,
    "render": RenderSpec,
}


@dataclass(frozen=True)
class Settings:
    """Everything a run needs, resolved from a preset plus overrides."""

    audio: AudioSpec = field(default_factory=AudioSpec)
    model: ModelSpec = field(default_factory=ModelSpec)
    train: TrainSpec = field(default_factory=TrainSpec)
    render: RenderSpec = field(default_factory=RenderSpec)
    preset: str = "defaults"

    def to_dict(self) -> dict[str, Any]:
        out: dict[str, Any] = {k: dataclasses.asdict(getattr(self, k)) for k in SPEC_TYPES}
        out["preset"] = self.preset
        return out

    def replace(self, **specs: Any) -> Settings:
        return dataclasses.replace(self, **specs)

    def with_overrides(self, overrides: dict[str, dict[str, Any]] | None) -> Settings:
        """These settings with ``overrides`` applied (``None`` values ignored) and validated."""
        return settings_from_dict(self.to_dict(), overrides, name=self.preset)


def _check_type(where: str, value: Any, hint: Any) -> Any:
    """Coerce a TOML/JSON value to the field's type, or fail naming ``where``."""
    origin = typing.get_origin(hint)
    args = typing.get_args(hint)
    if origin in (typing.Union, getattr(__import__("types"), "UnionType", None)):
        if value is None and type(None) in args:
            return None
        hint = next(a for a in args if a is not type(None))
    if hint is bool:
        if not isinstance(value, bool):
            _fail(where, f"{value!r} must be true or false")
        return value
    if hint is int:
        if isinstance(value, bool) or not isinstance(value, int):
            _fail(where, f"{value!r} must be a whole number")
        return value
    if hint is float:
        if isinstance(value, bool) or not isinstance(value, (int, float)):
            _fail(where, f"{value!r} must be a number")
        return float(value)
    if hint is str:
        if isinstance(value, (int, float)) and not isinstance(value, bool):
            value = str(value).removesuffix(".0") if where.endswith("bit_depth") else value
        if not isinstance(value, str):
            _fail(where, f"{value!r} must be a string")
        return value
    return value


def spec_from_dict(cls: type, data: dict[str, Any], table: str) -> Any:
    """Build a spec dataclass from a mapping, rejecting unknown keys and wrong types."""
    if not isinstance(data, dict):
        _fail(table, "must be a table of settings")
    hints = typing.get_type_hints(cls)
    names = {f.name for f in dataclasses.fields(cls)}
    kwargs = {}
    for key, value in data.items():
        if key not in names:
            known = ", ".join(sorted(names))
            _fail(f"{table}.{key}", f"unknown key (known keys: {known})")
        kwargs[key] = _check_type(f"{table}.{key}", value, hints[key])
    return cls(**kwargs)


def presets_dir() -> Path:
    """Where the shipped presets live: inside the wheel, or at the repo root."""
    here = Path(__file__).resolve().parent
    for candidate in (here / "presets", here.parent / "presets"):
        if candidate.is_dir():
            return candidate
    return here.parent / "presets"


def preset_names() -> list[str]:
    return sorted(p.stem for p in presets_dir().glob("*.toml"))


def resolve_preset_path(preset: str | Path) -> Path:
    """A preset name from presets/ or a path to the user's own TOML file."""
    p = Path(preset)
    if p.suffix == ".toml" or p.exists() or "/" in str(preset):
        if not p.is_file():
            raise PresetError(f"{p}: preset file not found")
        return p
    path = presets_dir() / f"{preset}.toml"
    if not path.is_file():
        known = preset_names()
        close = difflib.get_close_matches(str(preset), known, n=1)
        hint = f"did you mean {close[0]!r}? " if close else ""
        raise PresetError(f"unknown preset {str(preset)!r} ({hint}known presets: "
                          f"{', '.join(known) or 'none found'})")
    return path


def load_settings(
    preset: str | Path = "drums", overrides: dict[str, dict[str, Any]] | None = None
) -> Settings:
    """Read a preset and apply overrides (``{"audio": {"sample_rate": 44100}}``).

    Override values of ``None`` are ignored, so CLI options that were not given
    can be passed straight through.
    """
    path = resolve_preset_path(preset)
    try:
        data = tomllib.loads(path.read_text(encoding="utf-8"))
    except (OSError, UnicodeDecodeError) as exc:
        raise PresetError(f"{path}: cannot read preset ({exc})") from None
    except tomllib.TOMLDecodeError as exc:
        raise PresetError(f"{path}: not valid TOML ({exc})") from None
    # a shipped preset is recorded by name, the user's own file by its path, so the
    # recorded settings (and the resume command built from them) find it again
    shipped = path.resolve().parent == presets_dir().resolve()
    name = path.stem if shipped else str(path)
    try:
        return settings_from_dict(data, overrides, name=name, where=str(path))
    except PresetError as exc:
        table, _, key = (exc.key or "").partition(".")
        if not key or (overrides or {}).get(table, {}).get(key) is not None:
            raise  # a table error names the file already; an override names itself
        raise PresetError(f"{path}: {exc}", key=exc.key) from None


def settings_from_dict(
    data: dict[str, Any],
    overrides: dict[str, dict[str, Any]] | None = None,
    *,
    name: str | None = None,
    where: str = "settings",
) -> Settings:
    """Build :class:`Settings` from a mapping of tables (a preset, or one stored in a file).

    The preset name is ``name``, else the mapping's own ``preset`` entry (settings stored in
    a bank, model file or manifest keep the name they were made with), else ``"custom"``.
    """
    stored = data.get("preset")
    name = name or (stored if isinstance(stored, str) and stored else "custom")
    data = {k: v for k, v in data.items() if k != "preset"}
    for table in data:
        if table not in SPEC_TYPES:
            raise PresetError(f"{where}: unknown table [{table}] (known: {', '.join(SPEC_TYPES)})")
    specs = {}
    for table, cls in SPEC_TYPES.items():
        if not isinstance(data.get(table, {}), dict):
            raise PresetError(f"{where}: [{table}] must be a table of settings")
        merged = dict(data.get(table, {}))
        for key, value in (overrides or {}).get(table, {}).items():
            if value is not None:
                merged[key] = value
        specs[table] = spec_from_dict(cls, merged, table)
    return Settings(**specs, preset=name)


DEFAULT_PRESET = "drums"


def choose_settings(
    preset: str | Path | None,
    stored: Settings | None = None,
    overrides: dict[str, dict[str, Any]] | None = None,
) -> tuple[Settings, str]:
    """The settings a run uses, and where they come from in words.

    An explicit ``preset`` wins; without one, the settings ``stored`` with the input
    (a bank's own, from :func:`pipeline.bank.stored_settings`) are used, else the
    default preset. ``overrides`` apply on top and are validated once, here.

    Returns
    -------
    settings : Settings
    source : str, e.g. ``"preset tiny"``, ``"the bank's settings (preset tiny)"``,
        ``"preset drums (the default)"``
    """
    if preset is not None:
        settings = load_settings(preset, overrides)
        return settings, f"preset {settings.preset}"
    if stored is not None:
        return stored.with_overrides(overrides), f"the bank's settings (preset {stored.preset})"
    settings = load_settings(DEFAULT_PRESET, overrides)
    return settings, f"preset {settings.preset} (the default)"
