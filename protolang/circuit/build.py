"""Turns a checked Circuit and a seed into an Instance: positions, per-cell parameters, connections.

Every random draw comes from its own stream, derived from the seed and the names of
the classes or pathways involved (``numpy.random.SeedSequence`` with a spawn key), so
adding or removing a pathway never changes positions, cell parameters or the
connections of other pathways. Within a stream the draw order is fixed: positions
x, y, z; parameters in the order of the class model's table (``schema.ADEX_PARAMETERS``,
``schema.HH_CORTICAL_PARAMETERS``, ``schema.HH_SQUID_PARAMETERS``); connections row by
row (pre ascending, then post ascending); then, for the connections that exist in that
order, n_sites, site_conductance, U, D, F.

Cell ids are contiguous blocks, one per class in file order. Positions are metres,
z is depth below the slab's top face. All parameters are SI.
"""

from __future__ import annotations

import zlib

import numpy as np

from ..language.errors import Collector, ProtocolError, error, suggest
from .schema import ADEX_PARAMETERS, MODEL_PARAMETERS, Circuit, Dist, IntDist, Pathway

__all__ = ["ENGINE_PARAMETERS", "MODEL_ENGINE_PARAMETERS", "Instance", "instantiate"]

#: Engine names of the adex parameters (the model of every class in older circuit files).
ENGINE_PARAMETERS: tuple[str, ...] = tuple(v[0] for v in ADEX_PARAMETERS.values())
#: Engine names of each model's parameters, in draw order.
MODEL_ENGINE_PARAMETERS: dict[str, tuple[str, ...]] = {
    model: tuple(v[0] for v in table.values()) for model, table in MODEL_PARAMETERS.items()}
CONNECTION_FIELDS: tuple[str, ...] = ("n_sites", "site_conductance", "U", "D", "F", "delay")

# stream numbers of the derived seeds (never reuse one for another purpose)
_POSITIONS, _PARAMETERS, _WIRING, _SYNAPSES = 1, 2, 3, 4
_MAX_REDRAWS = 200
_ROW_BLOCK = 256  # pre cells per block when wiring: bounds memory for large classes


def _stream(seed: int, purpose: int, *names: str) -> np.random.Generator:
    key = (purpose,) + tuple(zlib.crc32(n.encode("utf-8")) for n in names)
    return np.random.default_rng(np.random.SeedSequence(entropy=seed, spawn_key=key))


def _draw(dist: Dist, rng: np.random.Generator, n: int, what: str) -> np.ndarray:
    """Draw ``n`` values of ``dist``; values outside its bounds are redrawn (truncation)."""
    if dist.kind == "fixed" or dist.spread == 0.0:
        return np.full(n, dist.center, dtype=float)

    def fresh(m: int) -> np.ndarray:
        z = rng.standard_normal(m)
        if dist.kind == "lognormal":
            return dist.center * np.exp(dist.spread * z)
        return dist.center + dist.spread * z

    values = fresh(n)
    for _ in range(_MAX_REDRAWS):
        bad = ~dist.inside(values)
        if not bad.any():
            return values
        values[bad] = fresh(int(bad.sum()))
    raise error(f"{what}: the spread leaves almost no values inside the allowed range",
                dist.span, expected="a spread small enough for the value's range",
                hint="reduce sd or sigma")


def _draw_counts(dist: IntDist, rng: np.random.Generator, n: int, what: str) -> np.ndarray:
    if dist.kind == "fixed" or dist.spread == 0.0:
        return np.full(n, int(round(dist.center)), dtype=np.int64)
    high = np.inf if dist.maximum is None else dist.maximum
    values = np.rint(dist.center + dist.spread * rng.standard_normal(n))
    for _ in range(_MAX_REDRAWS):
        bad = (values < dist.minimum) | (values > high)
        if not bad.any():
            return values.astype(np.int64)
        values[bad] = np.rint(dist.center + dist.spread * rng.standard_normal(int(bad.sum())))
    raise error(f"{what}: the spread leaves almost no counts between min and max", dist.span,
                expected="a spread small enough for min and max", hint="reduce sd")


class Instance:
    """One drawn realisation of a circuit: cells, their parameters and their connections.

    Arrays are read-only. Connections are stored sparsely, sorted by (pre, post).
    """

    def __init__(self, circuit: Circuit, seed: int, class_index: np.ndarray,
                 positions: np.ndarray, params: dict[str, np.ndarray], pre: np.ndarray,
                 post: np.ndarray, pathway: np.ndarray, fields: dict[str, np.ndarray]) -> None:
        self.circuit = circuit
        self.seed = seed
        self.class_names: list[str] = list(circuit.classes)
        self.class_index = _frozen(class_index)
        self.positions = _frozen(positions)
        self._params = {k: _frozen(v) for k, v in params.items()}
        self._starts = np.concatenate([[0], np.cumsum([c.count for c in circuit.classes.values()])])
        order = np.argsort(pre.astype(np.int64) * self.n_cells + post, kind="stable")
        self.pre = _frozen(pre[order])
        self.post = _frozen(post[order])
        self.pathway_index = _frozen(pathway[order])
        self._fields = {k: _frozen(v[order]) for k, v in fields.items()}
        self._keys = self.pre.astype(np.int64) * self.n_cells + self.post
        self._by_post = np.argsort(self.post.astype(np.int64) * self.n_cells + self.pre,
                                   kind="stable")
        self._posts_sorted = self.post[self._by_post]

    # -- cells -----------------------------------------------------------------------
    @property
    def n_cells(self) -> int:
        return int(self.class_index.shape[0])

    @property
    def n_connections(self) -> int:
        return int(self.pre.shape[0])

    def ids_of(self, class_name: str) -> np.ndarray:
        """Ids of all cells of ``class_name`` (ascending).

        Raises:
            KeyError: no such class (the message suggests the closest name).
        """
        if class_name not in self.circuit.classes:
            hint = suggest(class_name, self.class_names)
            raise KeyError(f"unknown cell class {class_name!r}" + (f"; {hint}" if hint else ""))
        k = self.class_names.index(class_name)
        return np.arange(self._starts[k], self._starts[k + 1])

    def class_of(self, ids: np.ndarray | int) -> np.ndarray:
        """Class name of each id."""
        return np.asarray(self.class_names, dtype=object)[self.class_index[ids]]

    def distance(self, i: np.ndarray | int, j: np.ndarray | int) -> np.ndarray:
        """Soma-to-soma distance (m) between cells ``i`` and ``j`` (broadcast elementwise)."""
        diff = self.positions[np.asarray(i)] - self.positions[np.asarray(j)]
        return np.sqrt(np.sum(diff * diff, axis=-1))

    def params_of(self, ids: np.ndarray | int) -> dict[str, np.ndarray]:
        """Model parameters of cells ``ids`` under the engine's names (SI units).

        The keys are those of the models of the cells' classes (NaN where a cell's model
        lacks one). adex: C (F), gL (S), EL (V), VT (V), DeltaT (V), a (S), tau_w (s),
        b (A), Vr (V), Vcut (V), t_ref (s); after a spike (V > Vcut) V is set to Vr and
        held there for t_ref while w keeps evolving; w jumps by b. hh_cortical and
        hh_squid: see ``MODEL_ENGINE_PARAMETERS`` (geometry in m, values per membrane
        area in S/m^2 and F/m^2, potentials in V, tau_max in s).
        """
        idx = np.asarray(ids)
        models = [self.circuit.classes[self.class_names[k]].model
                  for k in np.unique(self.class_index[idx])]
        keys: list[str] = []
        for model in dict.fromkeys(models):
            keys += [k for k in MODEL_ENGINE_PARAMETERS[model] if k not in keys]
        return {k: self._params[k][idx].copy() for k in keys}

    # -- connections -----------------------------------------------------------------
    def _lookup(self, pre_ids, post_ids) -> tuple[np.ndarray, np.ndarray]:
        pre, post = np.broadcast_arrays(np.asarray(pre_ids, dtype=np.int64),
                                        np.asarray(post_ids, dtype=np.int64))
        keys = pre * self.n_cells + post
        pos = np.searchsorted(self._keys, keys)
        clipped = np.minimum(pos, max(self.n_connections - 1, 0))
        found = (pos < self.n_connections) & (self._keys[clipped] == keys) \
            if self.n_connections else np.zeros(keys.shape, dtype=bool)
        return found, clipped

    def connected(self, pre_ids, post_ids) -> np.ndarray:
        """True where the circuit has a connection ``pre -> post`` (broadcast elementwise)."""
        return self._lookup(pre_ids, post_ids)[0]

    def connection_params(self, pre_ids, post_ids) -> dict[str, np.ndarray]:
        """Parameters of the connections ``pre -> post`` (broadcast elementwise).

        Returns:
            n_sites (int, 0 where not connected), site_conductance (S), U, D (s),
            F (s) and delay (s), NaN where not connected. U holds at the circuit's
            reference calcium.
        """
        found, idx = self._lookup(pre_ids, post_ids)
        out: dict[str, np.ndarray] = {}
        for name in CONNECTION_FIELDS:
            values = self._fields[name][idx] if self.n_connections else \
                np.zeros(found.shape, dtype=self._fields[name].dtype)
            if name == "n_sites":
                out[name] = np.where(found, values, 0).astype(np.int64)
            else:
                out[name] = np.where(found, values, np.nan)
        return out

    def connections_at(self, index: np.ndarray) -> dict[str, np.ndarray]:
        """Parameters of the stored connections at positions ``index`` (of ``pre``/``post``).

        Returns:
            The :data:`CONNECTION_FIELDS` arrays (n_sites int, the rest SI floats).
        """
        index = np.asarray(index, dtype=np.int64)
        return {name: self._fields[name][index].copy() for name in CONNECTION_FIELDS}

    def targets_of(self, pre_id: int) -> np.ndarray:
        """Ids of all cells that ``pre_id`` connects to (ascending)."""
        lo = np.searchsorted(self._keys, int(pre_id) * self.n_cells)
        hi = np.searchsorted(self._keys, (int(pre_id) + 1) * self.n_cells)
        return self.post[lo:hi].copy()

    def sources_of(self, post_id: int) -> np.ndarray:
        """Ids of all cells that connect to ``post_id`` (ascending)."""
        lo = np.searchsorted(self._posts_sorted, int(post_id), side="left")
        hi = np.searchsorted(self._posts_sorted, int(post_id), side="right")
        return self.pre[self._by_post[lo:hi]].copy()

    def pathway_of(self, pre_class: str, post_class: str) -> Pathway | None:
        """The pathway from ``pre_class`` to ``post_class``, or None if the file has none."""
        return self.circuit.pathways.get(f"{pre_class}->{post_class}")

    def true_probability(self, pathway: Pathway | str, distance) -> np.ndarray:
        """The file's connection rule p(d) = p0 exp(-d / lambda) for d <= max distance, else 0.

        Args:
            pathway: a Pathway or its name ``"pre->post"``.
            distance: soma distance(s) in metres.
        """
        if isinstance(pathway, str):
            found = self.circuit.pathways.get(pathway)
            if found is None:
                hint = suggest(pathway, self.circuit.pathways)
                raise KeyError(f"no pathway {pathway!r}" + (f"; {hint}" if hint else ""))
            pathway = found
        return pathway.probability(distance)


def _frozen(a: np.ndarray) -> np.ndarray:
    a = np.ascontiguousarray(a)
    a.flags.writeable = False
    return a


def instantiate(circuit: Circuit, seed: int) -> Instance:
    """Draw positions, per-cell parameters and connections of ``circuit``.

    Args:
        circuit: a checked circuit from :func:`protolang.circuit.schema.load_circuit`.
        seed: a non-negative integer; the same circuit and seed give identical arrays.

    Returns:
        The :class:`Instance`.

    Raises:
        ProtocolError: a parameter spread makes some drawn cells impossible (e.g. a
            reset above the spike cut), cited at the class's line in the circuit file.
        ValueError: ``seed`` is not a non-negative integer.
    """
    if isinstance(seed, bool) or not isinstance(seed, (int, np.integer)) or seed < 0:
        raise ValueError(f"seed must be a non-negative integer, got {seed!r}")
    seed = int(seed)
    classes = list(circuit.classes.values())
    n = sum(c.count for c in classes)
    class_index = np.repeat(np.arange(len(classes)), [c.count for c in classes])
    positions = np.empty((n, 3))
    names: list[str] = []
    for model in dict.fromkeys(c.model for c in classes):
        names += [k for k in MODEL_ENGINE_PARAMETERS[model] if k not in names]
    params = {k: np.full(n, np.nan) for k in names}
    problems = Collector()
    start = 0
    for cls in classes:
        ids = slice(start, start + cls.count)
        layer = circuit.layers[cls.layer]
        rng = _stream(seed, _POSITIONS, cls.name)
        positions[ids, 0] = rng.uniform(0.0, circuit.extent[0], cls.count)
        positions[ids, 1] = rng.uniform(0.0, circuit.extent[1], cls.count)
        positions[ids, 2] = rng.uniform(layer.top, layer.bottom, cls.count)
        rng = _stream(seed, _PARAMETERS, cls.name)
        for yaml_name, (engine, _, _) in MODEL_PARAMETERS[cls.model].items():
            try:
                params[engine][ids] = _draw(cls.parameters[engine], rng, cls.count,
                                            f"classes.{cls.name}.parameters.{yaml_name}")
            except ProtocolError as exc:
                problems.diagnostics.extend(exc.diagnostics)
        if cls.model == "adex":
            _check_cells(cls.name, {k: v[ids] for k, v in params.items()}, cls, problems)
        start += cls.count
    problems.raise_if_any()

    pre_all, post_all, path_all = [], [], []
    fields: dict[str, list[np.ndarray]] = {k: [] for k in CONNECTION_FIELDS}
    starts = dict(zip(circuit.classes, np.concatenate([[0], np.cumsum([c.count for c in classes])])))
    for p in circuit.pathways.values():
        pre_ids = np.arange(starts[p.pre], starts[p.pre] + circuit.classes[p.pre].count)
        post_ids = np.arange(starts[p.post], starts[p.post] + circuit.classes[p.post].count)
        rows, cols, dist = _wire(p, pre_ids, post_ids, positions, seed)
        rng = _stream(seed, _SYNAPSES, p.pre, p.post)
        where = f"pathways[{p.index}]"
        m = rows.shape[0]
        try:
            fields["n_sites"].append(_draw_counts(p.sites, rng, m, f"{where}.sites"))
            fields["site_conductance"].append(_draw(p.site_conductance, rng, m,
                                                    f"{where}.site_conductance"))
            fields["U"].append(_draw(p.U, rng, m, f"{where}.release.U"))
            fields["D"].append(_draw(p.D, rng, m, f"{where}.release.D"))
            fields["F"].append(_draw(p.F, rng, m, f"{where}.release.F"))
        except ProtocolError as exc:
            problems.diagnostics.extend(exc.diagnostics)
            continue
        fields["delay"].append(p.latency + dist / p.velocity)
        pre_all.append(rows)
        post_all.append(cols)
        path_all.append(np.full(m, p.index, dtype=np.int64))
    problems.raise_if_any()

    def cat(parts: list[np.ndarray], dtype) -> np.ndarray:
        return np.concatenate(parts).astype(dtype) if parts else np.empty(0, dtype=dtype)

    return Instance(
        circuit, seed, class_index, positions, params,
        cat(pre_all, np.int64), cat(post_all, np.int64), cat(path_all, np.int64),
        {k: cat(v, np.int64 if k == "n_sites" else float) for k, v in fields.items()},
    )


def _wire(p: Pathway, pre_ids: np.ndarray, post_ids: np.ndarray, positions: np.ndarray,
          seed: int) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Draw the connections of one pathway; return (pre ids, post ids, distances)."""
    rng = _stream(seed, _WIRING, p.pre, p.post)
    same = p.pre == p.post
    post_pos = positions[post_ids]
    rows, cols, dists = [], [], []
    # One uniform per ordered pair, drawn block by block in row-major order: the stream
    # is the same as one (n_pre, n_post) draw, so the block size never changes results.
    for b0 in range(0, pre_ids.shape[0], _ROW_BLOCK):
        block = pre_ids[b0:b0 + _ROW_BLOCK]
        diff = positions[block][:, None, :] - post_pos[None, :, :]
        d = np.sqrt(np.einsum("ijk,ijk->ij", diff, diff))
        u = rng.random(d.shape)
        hit = u < p.probability(d)
        if same:
            hit[np.arange(block.shape[0]), block - post_ids[0]] = False
        r, c = np.nonzero(hit)
        rows.append(block[r])
        cols.append(post_ids[c])
        dists.append(d[r, c])
    if not rows:
        return np.empty(0, np.int64), np.empty(0, np.int64), np.empty(0)
    return np.concatenate(rows), np.concatenate(cols), np.concatenate(dists)


def _check_cells(name: str, p: dict[str, np.ndarray], cls, problems: Collector) -> None:
    """Drawn cells must reset and rest below the spike cut, or the model cannot run."""
    for engine, word in (("VT", "V_T"), ("Vr", "V_reset"), ("EL", "E_leak")):
        bad = int(np.sum(p[engine] >= p["Vcut"]))
        if bad:
            span = cls.parameters[engine].span
            problems.fail(f"classes.{name}.parameters.{word}: the spread puts {word} at or above "
                          f"V_cut in {bad} of {cls.count} cells", span,
                          expected=f"{word} below V_cut in every cell",
                          hint=f"reduce the sd of {word} or V_cut")
