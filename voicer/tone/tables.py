"""Modal tables: the predicted partials of every key at every velocity layer.

For each key and hammer speed the contact simulation gives each string's free vibration;
the sound source is the force the strings exert on the bridge (``T u_x - E I u_xxx`` at
the bridge end, :func:`~voicer.physics.strings.bridge_force_factors`). A key's table
holds, per velocity layer, string and partial, the complex amplitude ``A`` of that force
so that ``f(t) = Re sum A exp((-sigma + i omega) t)`` from the first touch of the hammer,
plus the frequency and decay rate of each partial and the contact figures of each layer.

Tables are computed in batches over keys, layers and strings and cached per key on disk
(:mod:`voicer.tone.cache`): changing one key's parameters recomputes that key only.
"""

from __future__ import annotations

__all__ = [
    "TABLE_MODEL_VERSION",
    "TableSettings",
    "KeyTable",
    "ModalTables",
    "Blows",
    "simulate_blows",
    "simulate_variants",
    "build_tables",
]

from dataclasses import asdict, dataclass, field
from typing import Any, Iterable, Sequence

import numpy as np
from numpy.typing import NDArray
from tqdm import tqdm

from ..errors import ParameterError
from ..physics.contact import DEFAULT_MAX_TIME_S, simulate_contacts
from ..physics.felt import felt_k
from ..physics.strike import StepSettings, build_problem, coupling_weights, residual_compliance
from ..physics.strings import DEFAULT_MAX_PARTIALS, DEFAULT_SAMPLE_RATE_HZ, bridge_force_factors
from ..physics.tuning import key_name
from .cache import digest, load_entry, store_entry
from .interp import pchip
from .params import ENGINE_ONLY_FIELDS
from .preset import Preset
from .velocity import DEFAULT_LAYERS, DEFAULT_MAX_SPEED_M_S, DEFAULT_MIN_SPEED_M_S, hammer_speed, layer_speeds

#: Bumped whenever the model changes what a table contains, so old cache entries miss.
TABLE_MODEL_VERSION = 4

_MAX_ROWS = 768  # string rows per batch: large enough to amortise the per-step overhead
_PAD_RATIO = 0.7  # a batch holds keys with at least this fraction of its largest mode count
_FLOOR = 1e-12  # amplitudes below this fraction of a key's largest are treated as this (log of nulls)


@dataclass(frozen=True)
class TableSettings:
    """What a table is computed for (part of every cache key).

    Attributes
    ----------
    layers : int >= 2
        Velocity layers (geometric hammer speeds).
    min_speed_m_s, max_speed_m_s : float
        Speeds of the softest and loudest layer.
    sample_rate_hz : float
        Partials are kept below 0.45 of it.
    max_partials : int
        Cap on partials per key.
    extra_modes : int
        Modes above the band simulated in the blow and then dropped.
    steps : StepSettings
        Time-step rules of the contact simulation.
    """

    layers: int = DEFAULT_LAYERS
    min_speed_m_s: float = DEFAULT_MIN_SPEED_M_S
    max_speed_m_s: float = DEFAULT_MAX_SPEED_M_S
    sample_rate_hz: float = DEFAULT_SAMPLE_RATE_HZ
    max_partials: int = DEFAULT_MAX_PARTIALS
    extra_modes: int = 8
    steps: StepSettings = field(default_factory=StepSettings)

    def speeds(self) -> NDArray[np.float64]:
        """Hammer speed of each layer."""
        return layer_speeds(self.layers, self.min_speed_m_s, self.max_speed_m_s)


@dataclass(frozen=True, eq=False)
class KeyTable:
    """The predicted partials of one key at each velocity layer.

    Attributes
    ----------
    key : int
        MIDI key.
    speeds_m_s : ndarray (L,)
        Hammer speed of each layer.
    freq_hz, sigma_per_s : ndarray (N,)
        Frequency and amplitude decay rate of each partial.
    amplitude_n : ndarray complex (L, S, N)
        Bridge-force amplitude per layer, string and partial, in newtons.
    contact_s, peak_force_n, rebound_m_s : ndarray (L,)
        Contact duration (first touch to last release), peak felt force, hammer rebound.
    contacts : ndarray of int (L,)
        Number of separate contacts in the blow.
    """

    key: int
    speeds_m_s: NDArray[np.float64]
    freq_hz: NDArray[np.float64]
    sigma_per_s: NDArray[np.float64]
    amplitude_n: NDArray[np.complex128]
    contact_s: NDArray[np.float64]
    peak_force_n: NDArray[np.float64]
    rebound_m_s: NDArray[np.float64]
    contacts: NDArray[np.int64]

    def to_arrays(self) -> dict[str, NDArray[Any]]:
        return {name: np.asarray(getattr(self, name)) for name in self.__dataclass_fields__}

    @classmethod
    def from_arrays(cls, arrays: dict[str, NDArray[Any]]) -> "KeyTable":
        return cls(**{name: (int(arrays[name]) if name == "key" else arrays[name]) for name in cls.__dataclass_fields__})

    def at_speed(self, speed_m_s: float) -> NDArray[np.complex128]:
        """Partial amplitudes (summed over the unison) at any hammer speed; see
        :meth:`at_speeds`."""
        return self.at_speeds(np.array([speed_m_s]))[0]

    def at_speeds(self, speeds_m_s: NDArray[np.float64]) -> NDArray[np.complex128]:
        """Partial amplitudes (summed over the unison) at several hammer speeds, (S, N).

        Log-magnitude and unwrapped phase are interpolated across the layers by a
        monotone cubic in log(speed). Beyond the outer layers the nearest layer's
        spectrum is scaled in proportion to the speed.
        """
        speeds = np.asarray(speeds_m_s, dtype=float)
        if np.any(~(speeds > 0)):
            raise ParameterError(f"hammer speeds {speeds} m/s must be > 0")
        total = self.amplitude_n.sum(axis=1)
        v = np.clip(speeds, self.speeds_m_s[0], self.speeds_m_s[-1])
        mag = np.abs(total)
        floor = _FLOOR * max(float(mag.max()), 1e-300)
        log_mag = np.log(np.maximum(mag, floor))
        phase = np.unwrap(np.angle(total), axis=0)
        x = np.log(self.speeds_m_s)
        out = np.exp(pchip(x, log_mag, np.log(v)) + 1j * pchip(x, phase, np.log(v)))
        return out * (speeds / v)[:, None]


@dataclass(frozen=True, eq=False)
class ModalTables:
    """Tables of the keys of a preset, and which were computed or read from the cache."""

    preset: Preset
    settings: TableSettings
    keys: dict[int, KeyTable]
    computed: tuple[int, ...]
    cached: tuple[int, ...]
    #: The blows with the una corda pedal down, where the model gives them (same entries).
    una_corda: dict[int, KeyTable] | None = None

    def __getitem__(self, key: int) -> KeyTable:
        try:
            return self.keys[key]
        except KeyError:
            raise ParameterError(f"key {key} has no table (built: {min(self.keys)}..{max(self.keys)})") from None

    def partials(self, key: int, velocity: int) -> tuple[NDArray[np.float64], NDArray[np.float64], NDArray[np.complex128]]:
        """Frequencies, decay rates and amplitudes for a MIDI key struck at a MIDI velocity."""
        table = self[key]
        speed = float(hammer_speed(velocity, self.preset.instrument))
        return table.freq_hz, table.sigma_per_s, table.at_speed(speed)


@dataclass(frozen=True, eq=False)
class Blows:
    """Result of :func:`simulate_blows`: tables and, if recorded, the force pulses."""

    tables: dict[int, KeyTable]
    force_n: dict[int, list[NDArray[np.float64]]] | None
    dt_s: dict[int, NDArray[np.float64]]


def _key_modes(preset: Preset, key: int, settings: TableSettings, una_corda: bool = False) -> dict[str, Any]:
    scale = preset.scale
    i = scale.index(key)
    v = scale.values
    band = len(scale.modes(key, sample_rate_hz=settings.sample_rate_hz, max_partials=settings.max_partials).n)
    # A few modes beyond the band take part in the blow (a short treble pulse still drives
    # them) and are dropped from the table; the rest yield statically (residual).
    modes = scale.modes(key, sample_rate_hz=float("inf"), max_partials=band + settings.extra_modes)
    length = float(v["speaking_length_m"][i])
    b = float(scale.b[i])
    beta, width = float(v["strike_ratio"][i]), float(v["hammer_width_mm"][i]) * 1e-3 / length
    modal_mass = float(scale.linear_mass_kg_per_m[i]) * length / 2.0
    strings = int(v["strings"][i])
    # Under the una corda the shifted hammer misses the first strings (bass side) and
    # meets the others with the less compacted felt beside its string grooves.
    missed = min(int(preset.instrument["una_corda_missed_strings"]), strings - 1) if una_corda else 0
    felt = float(v["felt_force_1mm_n"][i]) * (float(v["una_corda_felt_factor"][i]) if una_corda else 1.0)
    return {
        "band": band,
        "modes": modes,
        "coupling": coupling_weights(b, modes.n, beta, width, end=scale.end),
        "residual": residual_compliance(b, modes.f0_hz, len(modes.n) + 1, beta, width, modal_mass, end=scale.end),
        "bridge": bridge_force_factors(b, modes.n, end=scale.end) * float(scale.tension_n[i]) / length,
        "modal_mass_kg": modal_mass,
        "strings": strings,
        "missed": missed,
        "offsets_m": [float(v[f"mating_{s}_mm"][i]) * 1e-3 for s in (1, 2, 3)],
        "hammer_kg": float(v["hammer_mass_g"][i]) * 1e-3,
        "felt_p": float(v["felt_exponent"][i]),
        "felt_k": float(felt_k(felt, v["felt_exponent"][i])),
        "hysteresis": float(v["felt_hysteresis"][i]) if preset.instrument["felt_law"] == "stulov" else 0.0,
        "relaxation_s": float(v["felt_relaxation_us"][i]) * 1e-6,
    }


def simulate_blows(preset: Preset, keys: Iterable[int], speeds_m_s: Iterable[float], *,
                   settings: TableSettings = TableSettings(), record: bool = False, una_corda: bool = False,
                   max_time_s: float = DEFAULT_MAX_TIME_S) -> Blows:
    """Simulate every key at every hammer speed in one batch (no cache).

    Parameters
    ----------
    preset : Preset
        The instrument.
    keys : iterable of int
        MIDI keys.
    speeds_m_s : iterable of float
        Hammer speeds, the same for every key (the layers of the resulting tables).
    settings : TableSettings
        Sample rate, partial cap and time-step rules (its own layers are not used).
    record : bool
        Keep the felt force at every step (for plots).
    una_corda : bool
        The blow with the una corda pedal down: the hammer misses
        ``una_corda_missed_strings`` of each unison (their amplitudes are zero; a key keeps
        one string) and its felt is ``una_corda_felt_factor`` times as stiff.
    max_time_s : float
        Bound on a blow's contact: one that has not released by then raises
        :class:`~voicer.errors.VoicerError` naming the key and the hammer speed.
    """
    keys = [int(k) for k in keys]
    tables, forces, dts = _simulate([(preset, k) for k in keys], speeds_m_s, settings=settings, record=record,
                                    una_corda=una_corda, max_time_s=max_time_s)
    return Blows(tables=dict(zip(keys, tables)), force_n=dict(zip(keys, forces)) if record else None,
                 dt_s=dict(zip(keys, dts)))


def simulate_variants(items: Sequence[tuple[Preset, int]], speeds_m_s: Iterable[float], *,
                      settings: TableSettings = TableSettings()) -> list[KeyTable]:
    """One key of each of several presets (e.g. felt variants for a fit), in one batch:
    the contact kernel's cost per time step hardly grows with the number of cases."""
    return _simulate(items, speeds_m_s, settings=settings, record=False)[0]


def _simulate(items: Sequence[tuple[Preset, int]], speeds_m_s: Iterable[float], *, settings: TableSettings,
              record: bool, una_corda: bool = False, max_time_s: float = DEFAULT_MAX_TIME_S
              ) -> tuple[list[KeyTable], list[NDArray[np.float64]], list[NDArray[np.float64]]]:
    speeds = np.asarray(list(speeds_m_s), dtype=float)
    info = [_key_modes(p, k, settings, una_corda) for p, k in items]
    n_max = max(len(d["modes"].n) for d in info)
    labels = []
    rows: dict[str, list[Any]] = {n: [] for n in ("hammer", "share", "offset", "omega", "sigma", "coupling", "mass",
                                                  "residual")}
    cases: dict[str, list[float]] = {n: [] for n in ("mass", "speed", "k", "p", "hyst", "tau")}
    for (_, k), d in zip(items, info):
        m = d["modes"]
        pad = n_max - len(m.n)
        omega = np.pad(m.omega, (0, pad), mode="edge")
        sigma = np.pad(m.sigma_per_s, (0, pad))
        coupling = np.pad(d["coupling"], (0, pad))
        for speed in speeds:
            h = len(labels)
            labels.append(f"key {k} ({key_name(k)}) at {speed:.3g} m/s")
            for name, value in (("mass", d["hammer_kg"]), ("speed", speed), ("k", d["felt_k"]), ("p", d["felt_p"]),
                                ("hyst", d["hysteresis"]), ("tau", d["relaxation_s"])):
                cases[name].append(value)
            struck = d["strings"] - d["missed"]
            for s in range(d["missed"], d["strings"]):
                for name, value in (("hammer", h), ("share", 1.0 / struck), ("offset", d["offsets_m"][s]),
                                    ("omega", omega), ("sigma", sigma), ("coupling", coupling),
                                    ("mass", d["modal_mass_kg"]), ("residual", d["residual"])):
                    rows[name].append(value)
    arr = {n: np.asarray(v) for n, v in cases.items()}
    problem = build_problem(
        labels=tuple(labels), mass_kg=arr["mass"], speed_m_s=arr["speed"], felt_k=arr["k"], felt_p=arr["p"],
        hysteresis=arr["hyst"], relaxation_s=arr["tau"], hammer=np.asarray(rows["hammer"]),
        share=np.asarray(rows["share"]), offset_m=np.asarray(rows["offset"]), omega=np.asarray(rows["omega"]),
        sigma=np.asarray(rows["sigma"]), coupling=np.asarray(rows["coupling"]), modal_mass_kg=np.asarray(rows["mass"]),
        residual_m_per_n=np.asarray(rows["residual"]), steps=settings.steps)
    result = simulate_contacts(problem, record=record, max_time_s=max_time_s)

    tables: list[KeyTable] = []
    forces: list[NDArray[np.float64]] = []
    dts: list[NDArray[np.float64]] = []
    row = 0
    for item, ((_, k), d) in enumerate(zip(items, info)):
        m = d["modes"]
        n, n_s = d["band"], d["strings"]
        h0 = item * len(speeds)
        first_row = row
        amp = np.zeros((len(speeds), n_s, n), dtype=complex)  # a missed string stays at rest
        for j in range(len(speeds)):
            for s in range(d["missed"], n_s):
                amp[j, s] = 2.0 * d["bridge"][:n] * result.eta0[row, :n]
                row += 1
        hs = slice(h0, h0 + len(speeds))
        tables.append(KeyTable(
            key=k, speeds_m_s=speeds.copy(), freq_hz=result.lam[first_row, :n].imag / (2 * np.pi),
            sigma_per_s=m.sigma_per_s[:n].copy(), amplitude_n=amp, contact_s=result.contact_s[hs].copy(),
            peak_force_n=result.peak_force_n[hs].copy(), rebound_m_s=result.rebound_m_s[hs].copy(),
            contacts=result.contacts[hs].copy()))
        dts.append(problem.dt_s[hs].copy())
        if record and result.force_n is not None:
            forces.append(result.force_n[hs])
    return tables, forces, dts


def _key_digest(preset: Preset, key: int, settings: TableSettings, una_corda: bool = False) -> str:
    i = preset.scale.index(key)
    inputs: dict[str, Any] = {
        "model": TABLE_MODEL_VERSION,
        "key": key,
        "values": {name: float(values[i]) for name, values in preset.resolved.items()
                   if name not in ENGINE_ONLY_FIELDS},
        "instrument": {name: preset.instrument[name] for name in ("a4_hz", "end_condition", "felt_law")},
        "settings": asdict(settings),
    }
    if una_corda:
        inputs["una_corda"] = {"missed": int(preset.instrument["una_corda_missed_strings"]),
                               "felt_factor": float(preset.resolved["una_corda_felt_factor"][i])}
    return digest(inputs)


def _batches(keys: list[int], modes: dict[int, int], strings: dict[int, int], layers: int) -> list[list[int]]:
    """Group keys of similar mode count so that padding wastes little."""
    order = sorted(keys, key=lambda k: -modes[k])
    batches: list[list[int]] = []
    for k in order:
        if batches:
            head, batch = batches[-1][0], batches[-1]
            rows = sum(strings[j] for j in batch) * layers
            if modes[k] >= _PAD_RATIO * modes[head] and rows + strings[k] * layers <= _MAX_ROWS:
                batch.append(k)
                continue
        batches.append([k])
    return batches


def build_tables(preset: Preset, *, settings: TableSettings = TableSettings(), keys: Iterable[int] | None = None,
                 use_cache: bool = True, progress: bool = False, una_corda: bool = False) -> ModalTables:
    """Tables for the keys of a preset (all by default), read from the cache where possible.

    Parameters
    ----------
    preset : Preset
        The instrument (and, later, its voicing).
    settings : TableSettings
        Layers, sample rate, partial cap, time steps.
    keys : iterable of int, optional
        Keys to build; default the whole compass.
    use_cache : bool
        Read and write the on-disk cache.
    progress : bool
        Show a progress bar on standard error.
    una_corda : bool
        Tables of the blow with the una corda pedal down (see :func:`simulate_blows`).
    """
    wanted = [int(k) for k in (keys if keys is not None else preset.scale.keys)]
    tables: dict[int, KeyTable] = {}
    names = {k: _key_digest(preset, k, settings, una_corda) for k in wanted}
    missing = []
    for k in wanted:
        entry = load_entry(names[k]) if use_cache else None
        if entry is not None:
            tables[k] = KeyTable.from_arrays(entry)
        else:
            missing.append(k)
    if missing:
        scale = preset.scale
        modes = {k: len(scale.modes(k, sample_rate_hz=settings.sample_rate_hz, max_partials=settings.max_partials).n)
                 + settings.extra_modes for k in missing}
        strings = {k: int(scale.value("strings", k)) for k in missing}
        speeds = settings.speeds()
        desc = "una corda tables" if una_corda else "modal tables"
        with tqdm(total=len(missing), unit="key", desc=desc, disable=not progress, leave=False) as bar:
            for batch in _batches(missing, modes, strings, settings.layers):
                done = simulate_blows(preset, batch, speeds, settings=settings, una_corda=una_corda).tables
                for k, table in done.items():
                    tables[k] = table
                    if use_cache:
                        store_entry(names[k], table.to_arrays())
                bar.update(len(batch))
    cached = tuple(k for k in wanted if k not in missing)
    return ModalTables(preset=preset, settings=settings, keys={k: tables[k] for k in wanted},
                       computed=tuple(sorted(missing)), cached=cached)
