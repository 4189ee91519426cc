"""Oscillator bank: the hot kernel of the live engine.

Every sounding partial is a decaying complex exponential ``c_k p_k^n`` with
``p_k = exp(lambda_k)``, ``lambda_k = (-sigma_k + i omega_k) / fs``; the output is
``y[n] = Re sum_k c_k p_k^n``. A block of ``frames <= max_block`` samples is one float32
matrix product: with the sample index split as ``n = I j + i`` (``I = split``),

    y[I j + i] = Re sum_k (c_k p_k^(I j)) p_k^i,

i.e. the (J x K) matrix ``[c_k p_k^(I j)]`` times the (K x I) table ``[p_k^i]`` of each
partial, written in real arithmetic as one ``(J, 2K) @ (2K, I)`` product (interleaved
real and imaginary parts, the imaginary part of the table negated). The tables depend on
the partial only and are computed when it is added. The master state ``c_k`` is
complex128 and advanced once per block by ``p_k^frames`` (a product of stored powers
``p_k^(2^b)``, so a segment of any length costs a few multiplies), so float32 rounding never
accumulates: it is confined to one block (drift bounds in ``tests/test_bank.py``). Long
float32 sums can lose accuracy, so partials are summed in chunks and the chunks in float64.

Partials live in slots ``0..count-1`` of preallocated arrays; removed partials leave
holes that the survivors from the top of the range fill (order does not matter for a
sum). A directory lists each owner's slots as one run, so an owner's partials are found
without a search over the bank. Nothing here allocates arrays after construction: every
operation writes into preallocated buffers (numpy's ``compress`` and ``nonzero`` make index
arrays, so selections go through :func:`_select`), so it may run inside an audio callback.
"""

from __future__ import annotations

__all__ = ["OscillatorBank", "PartialTables", "partial_tables", "DEFAULT_SPLIT", "DEFAULT_CHUNK"]

from dataclasses import dataclass

import numpy as np
from numpy.typing import NDArray

from ..errors import ParameterError

#: Samples per row of the block matrix (I): 16 rows of 16 make a 256-sample block. The
#: table [p^i] costs 2 I floats per partial and the rows 2 J, so memory traffic is least
#: near I = sqrt(block); measured on this machine (scripts/bench_engine.py), 16 beat 8, 32
#: and 64 at blocks of both 128 and 256.
DEFAULT_SPLIT = 16
#: Partials per float32 product; the chunks are summed in float64. With OpenBLAS the error
#: of the sum does not grow with the chunk (about 4e-7 of the rms from 256 to 60,000
#: partials per chunk, tests/test_bank.py), so the chunk bounds the scratch memory and the
#: calls per block; another BLAS may sum less carefully.
DEFAULT_CHUNK = 16384
_MOVE_CHUNK = 8192  # slots moved per step when compacting (bounds the scratch memory)


@dataclass(frozen=True, eq=False)
class PartialTables:
    """Everything the bank needs about a set of partials, computed ahead of time.

    Built by :func:`partial_tables` off the audio thread; :meth:`OscillatorBank.add_tables`
    and :meth:`OscillatorBank.retune` only copy from it.
    """

    lam: NDArray[np.complex128]  # (n,) log of the per-sample factor
    table: NDArray[np.float32]  # (n, 2, split) [Re p^i, -Im p^i]
    steps: NDArray[np.complex64]  # (rows, n) p^(I j)
    powers: NDArray[np.complex128]  # (bits, n) p^(2^b), b = 0..bits-1


def partial_tables(lam: NDArray[np.complex128], *, split: int, max_block: int) -> PartialTables:
    """Power tables of partials with per-sample log-factors ``lam`` (allocates)."""
    lam = np.asarray(lam, dtype=np.complex128)
    rows = -(-max_block // split)
    tab = np.exp(np.outer(lam, np.arange(split)))
    table = np.empty((len(lam), 2, split), dtype=np.float32)
    table[:, 0] = tab.real
    table[:, 1] = -tab.imag
    steps = np.exp(np.outer(np.arange(rows) * split, lam)).astype(np.complex64)
    powers = np.exp(np.outer(2.0 ** np.arange(_bits(max_block)), lam))
    return PartialTables(lam=lam.copy(), table=table, steps=steps, powers=powers)


def _bits(max_block: int) -> int:
    """Binary digits needed for every segment length 1..max_block."""
    return max(int(max_block).bit_length(), 1)


def _gather_scatter(src: NDArray, src_idx: NDArray[np.int64], dst: NDArray, dst_idx: NDArray[np.int64],
                    buf: NDArray, axis: int) -> None:
    """``dst[dst_idx] = src[src_idx]`` along ``axis`` through ``buf``, without temporaries.

    ``mode="clip"`` keeps ``take`` from buffering its output (the indices are valid);
    along axis 1 each row goes separately, since a strided 2-D ``out`` would be buffered.
    """
    n = len(src_idx)
    if axis == 0:
        src.take(src_idx, axis=0, out=buf[:n], mode="clip")
        dst[dst_idx] = buf[:n]
    else:
        for j in range(src.shape[0]):
            row = buf[j, :n]
            src[j].take(src_idx, out=row, mode="clip")
            dst[j][dst_idx] = row  # a 2-D index dst[j, idx] builds an index iterator (~3 kB)


def _count_before(mask: NDArray[np.bool_], run: NDArray[np.int64], flags: NDArray[np.int64]) -> int:
    """``run[i]`` = how many of ``mask[:i]`` are set, for ``i = 0..len(mask)``; returns the
    total. ``flags[:len(mask)]`` is left holding the mask as 0/1."""
    k = len(mask)
    flag = flags[:k]
    np.copyto(flag, mask)  # cast here: cumsum would cast through a buffer
    run[0] = 0
    np.cumsum(flag, out=run[1:k + 1])
    return int(run[k])


def _scatter_selected(values: NDArray, out: NDArray, run: NDArray[np.int64], flags: NDArray[np.int64],
                      h: int) -> None:
    """After :func:`_count_before`: ``out[:h] = values[mask]`` in order (``run[:k]`` is
    overwritten). Selected item ``i`` goes to position ``run[i]``, every other item to
    the spare position ``h`` (``out`` needs ``h + 1``), so no kept position is written twice."""
    k = len(values)
    pos, flag = run[:k], flags[:k]
    np.subtract(pos, h, out=pos)
    np.multiply(pos, flag, out=pos)
    np.add(pos, h, out=pos)
    out[pos] = values


def _select(mask: NDArray[np.bool_], values: NDArray, out: NDArray, run: NDArray[np.int64],
            flags: NDArray[np.int64]) -> int:
    """``out[:h] = values[mask]`` without the index arrays that ``np.compress`` makes (8-16
    bytes per selected item); returns ``h``. ``run`` and ``flags`` are int64 scratch of
    ``len(mask) + 1``."""
    h = _count_before(mask, run, flags)
    _scatter_selected(values, out, run, flags, h)
    return h


class OscillatorBank:
    """A pool of decaying complex exponentials rendered block by block.

    Parameters
    ----------
    capacity : int > 0
        Most partials at once.
    max_block : int > 0
        Longest block ``render`` is asked for.
    split : int > 0
        Samples per row of the block matrix.
    chunk : int > 0
        Partials per float32 partial sum.
    owners : int > 0
        Owner ids are 0..owners-1 (the engine's voices). An owner adds its partials in one
        call, and again only once it has none left; ``owner_counts`` keeps its count.
    """

    def __init__(self, capacity: int, *, owners: int, max_block: int = 256, split: int = DEFAULT_SPLIT,
                 chunk: int = DEFAULT_CHUNK) -> None:
        for name, value in (("capacity", capacity), ("owners", owners), ("max_block", max_block),
                            ("split", split), ("chunk", chunk)):
            if value < 1:
                raise ParameterError(f"{name}={value} must be >= 1")
        self.capacity, self.max_block, self.split, self.chunk = capacity, max_block, split, chunk
        rows = -(-max_block // split)
        self.count = 0
        self.state = np.zeros(capacity, dtype=np.complex128)  # c_k at the next sample
        self.lam = np.zeros(capacity, dtype=np.complex128)  # log of the per-sample factor
        self.owner = np.full(capacity, -1, dtype=np.int64)  # who added the partial (the engine's voice)
        self.index = np.zeros(capacity, dtype=np.int64)  # the owner's number for it (partial n)
        self.owner_counts = np.zeros(owners, dtype=np.int64)  # partials per owner id
        # The directory: _dir[:count] lists the slots owner by owner, owner v's run starting
        # at _start[v] (owner_counts[v] long). _pos: its inverse, built when compacting.
        self._dir = np.zeros(capacity + 1, dtype=np.int64)  # + 1: _select's spare position
        self._dir_spare = np.zeros(capacity + 1, dtype=np.int64)
        self._pos = np.zeros(capacity, dtype=np.int64)
        self._start = np.zeros(owners, dtype=np.int64)
        self._owner_scratch = np.zeros(owners, dtype=np.int64)
        self._run = np.zeros(capacity + 1, dtype=np.int64)  # _select's scratch
        self._flags = np.zeros(capacity + 1, dtype=np.int64)
        self._kept = np.zeros(capacity, dtype=bool)  # the keep mask in directory order
        self._table = np.zeros((capacity, 2, split), dtype=np.float32)  # [Re p^i, -Im p^i]
        self._steps = np.zeros((rows, capacity), dtype=np.complex64)  # p^(I j), slots along the rows
        self._bits = _bits(max_block)
        # p^(2^b), bit-major: advance reads one contiguous row per set bit of the block length.
        self._powers = np.zeros((self._bits, capacity), dtype=np.complex128)
        # Scratch, sized once.
        self._c32 = np.zeros(capacity, dtype=np.complex64)
        self._rows = np.zeros(rows * chunk, dtype=np.complex64)  # viewed as a contiguous (rows, k)
        self._part = np.zeros((rows, split), dtype=np.float32)
        self._sum = np.zeros((rows, split), dtype=np.float64)
        self._part64 = np.zeros((rows, split), dtype=np.float64)
        self._scratch = np.zeros(capacity, dtype=np.complex128)
        self._mag = np.zeros(capacity, dtype=np.float64)
        self._keep = np.zeros(capacity, dtype=bool)
        self._hole_mask = np.zeros(capacity, dtype=bool)
        self._slots = np.arange(capacity)
        self._holes = np.zeros(capacity + 1, dtype=np.int64)
        self._picked = np.zeros(capacity, dtype=np.int64)
        self._g_state = np.zeros(chunk, dtype=np.complex128)
        self._g_c32 = np.zeros(chunk, dtype=np.complex64)
        self._g_step = np.zeros(chunk, dtype=np.complex64)
        self._g_table = np.zeros((chunk, 2, split), dtype=np.float32)
        self._movers = np.zeros(capacity + 1, dtype=np.int64)
        # Scratch for moving slots, a bounded number at a time (see _compact).
        self._move_max = min(capacity, _MOVE_CHUNK)
        self._moved = [(arr, np.zeros((self._move_max, *arr.shape[1:]), dtype=arr.dtype), 0) for arr in
                       (self.state, self.lam, self.owner, self.index, self._table)]
        self._moved += [(arr, np.zeros((arr.shape[0], self._move_max), dtype=arr.dtype), 1) for arr in
                        (self._steps, self._powers)]

    # --- adding and changing partials ------------------------------------------------

    def _fill_tables(self, lo: int, hi: int) -> None:
        """Recompute the power tables of slots lo..hi-1 from their lambda (allocates: the
        audio thread adds precomputed tables with :meth:`add_tables` instead)."""
        tables = partial_tables(self.lam[lo:hi], split=self.split, max_block=self.max_block)
        self._table[lo:hi] = tables.table
        self._steps[:, lo:hi] = tables.steps
        self._powers[:, lo:hi] = tables.powers

    def _claim(self, owner: int, n: int) -> int:
        """Slots ``count..count+n-1`` for ``owner``, entered in the directory; returns the first."""
        lo, hi = self.count, self.count + n
        if hi > self.capacity:
            raise ParameterError(f"oscillator bank full: {self.count} + {n} partials > capacity {self.capacity}")
        if not 0 <= owner < len(self.owner_counts):
            raise ParameterError(f"owner {owner} must be in 0..{len(self.owner_counts) - 1}")
        if self.owner_counts[owner]:
            raise ParameterError(f"owner {owner} still has {self.owner_counts[owner]} partials: "
                                 "an owner adds once until they are gone")
        self.owner[lo:hi] = owner
        self.owner_counts[owner] = n
        self._start[owner] = lo  # the directory ends at count: the new run goes there
        self._dir[lo:hi] = self._slots[lo:hi]
        return lo

    def add(self, lam: NDArray[np.complex128], amplitude: NDArray[np.complex128], owner: int,
            index: NDArray[np.int64] | None = None) -> int:
        """Add partials, computing their tables (allocates; see :meth:`add_tables`);
        returns the first slot used (they occupy ``n`` consecutive slots until partials
        are removed).

        Parameters
        ----------
        lam : ndarray complex (n,)
            ``(-sigma + i omega) / fs`` of each partial.
        amplitude : ndarray complex (n,)
            Complex amplitude at the next sample rendered.
        owner : int, 0 <= owner < owners
            Recorded in ``owner`` for the caller's bookkeeping; it must have no partials.
        index : ndarray of int (n,), optional
            Recorded in ``index`` (e.g. the partial number); default 0..n-1.

        Raises
        ------
        ParameterError
            If the bank has no room (the caller's voice limit should prevent this), or the
            owner is out of range or has partials already.
        """
        n = len(lam)
        lo = self._claim(owner, n)
        hi = lo + n
        self.lam[lo:hi] = lam
        self.state[lo:hi] = amplitude
        self.index[lo:hi] = self._slots[:n] if index is None else index
        self._fill_tables(lo, hi)
        self.count = hi
        return lo

    def add_tables(self, tables: PartialTables, amplitude: NDArray[np.complex128], owner: int, at: int = 0,
                   correct: tuple[NDArray[np.floating], int] | None = None) -> int:
        """Add partials from precomputed tables; ``index`` records each partial's row in
        ``tables``. Returns the first slot used.

        ``at`` is the sample of the current block where they start (``amplitude`` is
        theirs at that sample): their state is referred back to the block start, so the
        block's later segments render them from ``at`` on. With ``correct = (out, stop)``
        (the block already rendered into ``out``), their samples ``at..stop-1`` are added
        to it.
        """
        n = len(tables.lam)
        lo = self._claim(owner, n)
        hi = lo + n
        self.lam[lo:hi] = tables.lam
        if at:
            back = self._scratch[:n]
            np.multiply(tables.lam, -float(at), out=back)
            np.exp(back, out=back)
            np.multiply(amplitude, back, out=self.state[lo:hi])
        else:
            self.state[lo:hi] = amplitude
        self.index[lo:hi] = self._slots[:n]
        self._table[lo:hi] = tables.table
        self._steps[:, lo:hi] = tables.steps
        self._powers[:, lo:hi] = tables.powers
        self.count = hi
        if correct is not None:
            self.render_slots(correct[0][at:], self._slots[lo:hi], at, correct[1])
        return lo

    def retune(self, owner: int, tables: PartialTables, at: int = 0,
               correct: tuple[NDArray[np.floating], int] | None = None) -> int:
        """Give every partial of ``owner`` the decay and frequency of its row in ``tables``
        (e.g. a damper falling on a key) from sample ``at`` of the current block on.
        Returns how many.

        The state is referred back to the block start under the new factor:
        ``c' = c p_old^at p_new^-at``, so that ``c' p_new^n`` is right for ``n >= at``.
        With ``correct = (out, stop)`` (the block already rendered into ``out``), the
        partials' old samples ``at..stop-1`` are taken out of it and their new ones added.
        """
        slots = self.owner_slots(owner)
        h = len(slots)
        if not h:
            return 0
        rows = self.index.take(slots, out=self._picked[:h], mode="clip")
        if correct is not None:
            self.render_slots(correct[0][at:], slots, at, correct[1], subtract=True)
        if at:
            old = self._moved[1][1]  # lam-shaped scratch
            new = self._scratch
            for lo in range(0, h, self._move_max):
                hi = min(lo + self._move_max, h)
                n = hi - lo
                self.lam.take(slots[lo:hi], out=old[:n], mode="clip")
                tables.lam.take(rows[lo:hi], out=new[:n], mode="clip")
                np.subtract(old[:n], new[:n], out=old[:n])
                np.multiply(old[:n], float(at), out=old[:n])
                np.exp(old[:n], out=old[:n])
                self.state.take(slots[lo:hi], out=new[:n], mode="clip")
                np.multiply(new[:n], old[:n], out=new[:n])
                self.state[slots[lo:hi]] = new[:n]
        for lo in range(0, h, self._move_max):
            hi = min(lo + self._move_max, h)
            n = hi - lo
            for src, dst, (_, buf, axis) in zip((tables.lam, tables.table, tables.steps, tables.powers),
                                                (self.lam, self._table, self._steps, self._powers),
                                                self._moved[1:2] + self._moved[4:]):
                _gather_scatter(src, rows[lo:hi], dst, slots[lo:hi], buf, axis)
        if correct is not None:
            self.render_slots(correct[0][at:], slots, at, correct[1])
        return h

    # --- rendering ---------------------------------------------------------------

    def render(self, out: NDArray[np.floating], frames: int) -> None:
        """Add the next ``frames`` samples of the sum to ``out[:frames]`` and advance."""
        self.render_segment(out, 0, frames)
        self.advance(frames)

    def render_segment(self, out: NDArray[np.floating], start: int, stop: int) -> None:
        """Add samples ``start..stop-1`` of the current block to ``out[:stop - start]``.

        The states refer to the start of the block; a block may be rendered in several
        segments (between events) and is then closed with :meth:`advance`. Segments need
        no advance of their own: a segment starting at ``start`` uses the rows of the
        ``p^(I j)`` table from ``start // I`` on.

        Parameters
        ----------
        out : ndarray float (>= stop - start,)
            Accumulator (float32 or float64).
        start, stop : int, 0 <= start < stop <= max_block
            Sample range within the block.
        """
        if not 0 <= start < stop <= self.max_block:
            raise ParameterError(f"segment {start}..{stop} must lie within 0..{self.max_block}")
        k_all = self.count
        if not k_all:
            return
        first, last = start // self.split, -(-stop // self.split)
        rows = last - first
        acc = self._sum[:rows]
        acc[:] = 0.0
        np.copyto(self._c32[:k_all], self.state[:k_all], casting="same_kind")
        for lo in range(0, k_all, self.chunk):
            hi = min(lo + self.chunk, k_all)
            k = hi - lo
            a = self._rows[: rows * k].reshape(rows, k)
            for j in range(rows):  # row by row: a broadcast product of a few thousand columns is buffered
                np.multiply(self._steps[first + j, lo:hi], self._c32[lo:hi], out=a[j])
            self._accumulate(a, self._table[lo:hi], acc)
        self._emit(out, acc, start, stop, first)

    def render_slots(self, out: NDArray[np.floating], slots: NDArray[np.int64], start: int, stop: int,
                     *, subtract: bool = False) -> None:
        """Add (or subtract) samples ``start..stop-1`` of the current block of some slots
        only to ``out[:stop - start]``: the correction when an event changes a few
        partials after the block was rendered whole."""
        m = len(slots)
        if not m or start >= stop:
            return
        first, last = start // self.split, -(-stop // self.split)
        rows = last - first
        acc = self._sum[:rows]
        acc[:] = 0.0
        for lo in range(0, m, self.chunk):
            hi = min(lo + self.chunk, m)
            k, idx = hi - lo, slots[lo:hi]
            self.state.take(idx, out=self._g_state[:k], mode="clip")
            c32 = self._g_c32[:k]
            np.copyto(c32, self._g_state[:k], casting="same_kind")
            a = self._rows[: rows * k].reshape(rows, k)
            step = self._g_step[:k]
            for j in range(rows):
                self._steps[first + j].take(idx, out=step, mode="clip")
                np.multiply(step, c32, out=a[j])
            table = self._g_table[:k]
            self._table.take(idx, axis=0, out=table, mode="clip")
            self._accumulate(a, table, acc)
        self._emit(out, acc, start, stop, first, subtract=subtract)

    def _accumulate(self, a: NDArray[np.complex64], table: NDArray[np.float32], acc: NDArray[np.float64]) -> None:
        """``acc += Re(a @ table)``: the (rows, k) block matrix times k partials' tables,
        as one real float32 product (interleaved parts, imaginary table negated)."""
        rows, k = a.shape
        part = self._part[:rows]
        np.matmul(a.view(np.float32), table.reshape(2 * k, self.split), out=part)
        wide = self._part64[:rows]
        np.copyto(wide, part)  # a float32 + float64 add would cast through a buffer
        np.add(acc, wide, out=acc)

    def _emit(self, out: NDArray[np.floating], acc: NDArray[np.float64], start: int, stop: int, first: int,
              *, subtract: bool = False) -> None:
        """Add (or subtract) the rendered rows' samples start..stop-1 to ``out``."""
        skip = start - first * self.split
        seg = acc.reshape(-1)[skip: skip + stop - start]
        if subtract:
            out[: stop - start] -= seg
        else:
            out[: stop - start] += seg

    def owner_slots(self, owner: int) -> NDArray[np.int64]:
        """The slots of one owner, in no particular order (a view of the directory, valid
        until partials are added or removed)."""
        if not 0 <= owner < len(self.owner_counts):
            raise ParameterError(f"owner {owner} must be in 0..{len(self.owner_counts) - 1}")
        lo = int(self._start[owner])
        return self._dir[lo: lo + int(self.owner_counts[owner])]

    def advance(self, frames: int) -> None:
        """Move every partial ``frames`` (1..max_block) samples on without rendering."""
        k = self.count
        if not k:
            return
        state = self.state[:k]
        for b in range(self._bits):
            if frames >> b & 1:
                state *= self._powers[b, :k]

    # --- removing partials -------------------------------------------------------

    def cull(self, threshold: float) -> int:
        """Remove partials whose magnitude is below ``threshold``; returns how many."""
        k = self.count
        if not k:
            return 0
        mag = self._mag[:k]
        np.abs(self.state[:k], out=mag)
        keep = self._keep[:k]
        np.greater_equal(mag, threshold, out=keep)
        return self._compact(keep)

    def remove_owner(self, owner: int, at: int = 0, correct: tuple[NDArray[np.floating], int] | None = None) -> int:
        """Remove every partial of one owner from sample ``at`` of the block on; returns
        how many. With ``correct = (out, stop)``, their samples ``at..stop-1`` are taken
        out of the already rendered ``out``."""
        slots = self.owner_slots(owner)
        if correct is not None:
            self.render_slots(correct[0][at:], slots, at, correct[1], subtract=True)
        keep = self._keep[: self.count]
        keep[:] = True
        keep[slots] = False
        return self._compact(keep)

    def _compact(self, keep: NDArray[np.bool_]) -> int:
        """Remove the partials not in ``keep``: the survivors above the new count fill the
        holes below it, and the directory follows."""
        k = self.count
        n_keep = int(np.count_nonzero(keep))
        if n_keep == k:
            return 0
        run, flags = self._run, self._flags
        # Each owner's run loses its removed slots; the runs stay in order, so an owner's
        # new start and end are the kept entries before its old ones.
        kept = self._kept[:k]
        keep.take(self._dir[:k], out=kept, mode="clip")
        _count_before(kept, run, flags)
        before = run[: k + 1]
        scratch = self._owner_scratch
        np.add(self._start, self.owner_counts, out=scratch)  # old ends
        before.take(scratch, out=self.owner_counts, mode="clip")  # new ends
        before.take(self._start, out=scratch, mode="clip")  # new starts
        np.subtract(self.owner_counts, scratch, out=self.owner_counts)
        self._start[:] = scratch
        _scatter_selected(self._dir[:k], self._dir_spare, run, flags, n_keep)
        self._dir, self._dir_spare = self._dir_spare, self._dir
        self._pos[self._dir[:n_keep]] = self._slots[:n_keep]  # where each slot is listed
        # As many survivors above n_keep as holes below it; each mover takes a hole.
        holes_mask = self._hole_mask[:n_keep]
        np.logical_not(keep[:n_keep], out=holes_mask)
        h = _select(holes_mask, self._slots[:n_keep], self._holes, run, flags)
        _select(keep[n_keep:k], self._slots[n_keep:k], self._movers, run, flags)
        holes, movers = self._holes[:h], self._movers[:h]
        places = self._pos.take(movers, out=self._picked[:h], mode="clip")
        self._dir[places] = holes
        for lo in range(0, h, self._move_max):
            hi = min(lo + self._move_max, h)
            self._copy_slots(movers[lo:hi], holes[lo:hi])
        self.state[n_keep:k] = 0.0
        self.owner[n_keep:k] = -1
        self.count = n_keep
        return k - n_keep

    def _copy_slots(self, src: NDArray[np.int64], dst: NDArray[np.int64]) -> None:
        for arr, buf, axis in self._moved:
            _gather_scatter(arr, src, arr, dst, buf, axis)
