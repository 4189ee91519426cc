"""Oscillator bank against float64 evaluation of the same exponentials (numpy reference)."""

from __future__ import annotations

import numpy as np
import pytest
from hypothesis import given
from hypothesis import strategies as st

from voicer.engine.bank import DEFAULT_CHUNK, OscillatorBank, _select, partial_tables
from voicer.errors import ParameterError

FS = 48_000.0


def random_partials(rng, n, *, f_lo=30.0, f_hi=20_000.0, t60_lo=0.5, t60_hi=40.0):
    freq = rng.uniform(f_lo, f_hi, n)
    sigma = np.log(1000.0) / rng.uniform(t60_lo, t60_hi, n)
    amp = rng.uniform(0.1, 1.0, n) * np.exp(2j * np.pi * rng.uniform(size=n))
    lam = (-sigma + 2j * np.pi * freq) / FS
    return lam, amp


def exact(lam, amp, start, frames):
    """y[n] = Re sum c p^n in float64/complex128, evaluated directly per sample."""
    n = np.arange(start, start + frames)
    return np.real(np.exp(np.outer(n, lam)) @ amp)


def render(bank, total, block):
    out = np.zeros(total)
    pos = 0
    while pos < total:
        frames = min(block, total - pos)
        bank.render(out[pos:], frames)
        pos += frames
    return out


def test_matches_direct_evaluation(rng) -> None:
    lam, amp = random_partials(rng, 500)
    bank = OscillatorBank(1000, owners=4, max_block=256)
    bank.add(lam, amp, owner=0)
    got = render(bank, 4800, 256)
    ref = exact(lam, amp, 0, 4800)
    # float32 products, float64 master state: error at float32 resolution of the sum.
    assert np.max(np.abs(got - ref)) < 2e-6 * np.sqrt(np.sum(np.abs(amp) ** 2)) * 10


@pytest.mark.parametrize("block", [1, 64, 65, 255])
def test_any_block_length_gives_the_same_samples(rng, block) -> None:
    lam, amp = random_partials(rng, 200)
    ref_bank, bank = OscillatorBank(400, owners=4, max_block=256), OscillatorBank(400, owners=4, max_block=256)
    ref_bank.add(lam, amp, owner=0)
    bank.add(lam, amp, owner=0)
    ref = render(ref_bank, 3000, 256)
    got = render(bank, 3000, block)
    np.testing.assert_allclose(got, ref, atol=1e-5 * np.abs(ref).max())


def test_no_drift_over_sixty_seconds(rng) -> None:
    """60 s of audio: the error against the exact float64 sum does not grow (the
    complex128 state is advanced once per block; float32 is confined to one block)."""
    lam, amp = random_partials(rng, 64, t60_lo=200.0, t60_hi=400.0)  # barely decaying
    bank = OscillatorBank(64, owners=4, max_block=256)
    bank.add(lam, amp, owner=0)
    total = int(60 * FS)
    out = render(bank, total, 256)
    second = int(FS)
    err_first = np.max(np.abs(out[:second] - exact(lam, amp, 0, second)))
    err_last = np.max(np.abs(out[-second:] - exact(lam, amp, total - second, second)))
    scale = np.sum(np.abs(amp))
    assert err_last < 1e-5 * scale  # float32-level accuracy after 60 s
    assert err_last < 3 * err_first + 1e-7 * scale  # and no growth


def exact_sum(lam, amp, frames, piece=4000):
    """:func:`exact` over many partials, a few thousand at a time (bounded memory)."""
    return sum(exact(lam[i:i + piece], amp[i:i + piece], 0, frames) for i in range(0, len(lam), piece))


@pytest.mark.parametrize("chunk", [256, 4096, DEFAULT_CHUNK, 60_000])
def test_many_partials_summed_in_chunks(rng, chunk) -> None:
    """60,000 partials in chunks of any size, the last one ragged, against the float64 sum:
    the error stays at float32 resolution of the rms (measured with OpenBLAS: 4e-7 rms and
    2e-6 peak, whatever the chunk)."""
    lam, amp = random_partials(rng, 60_000)
    bank = OscillatorBank(60_000, owners=1, max_block=256, chunk=chunk)
    bank.add(lam, amp, owner=0)
    got = render(bank, 512, 256)
    ref = exact_sum(lam, amp, 512)
    rms = np.sqrt(np.mean(ref**2))
    assert np.sqrt(np.mean((got - ref) ** 2)) < 2e-6 * rms
    assert np.max(np.abs(got - ref)) < 1e-5 * rms


def test_cull_removes_only_quiet_partials(rng) -> None:
    lam, amp = random_partials(rng, 300)
    amp[::3] *= 1e-7  # a third far below the threshold
    bank, ref_bank = OscillatorBank(300, owners=4), OscillatorBank(300, owners=4)
    bank.add(lam, amp, owner=1, index=np.arange(300))
    loud = np.abs(amp) > 1e-3
    ref_bank.add(lam[loud], amp[loud], owner=1)
    assert bank.cull(1e-5) == 100 and bank.count == 200
    assert sorted(bank.index[:200].tolist()) == np.flatnonzero(loud).tolist()
    ref = render(ref_bank, 1024, 256)
    # Same partials in another order: equal to float32 rounding of the sum.
    np.testing.assert_allclose(render(bank, 1024, 256), ref, atol=1e-5 * np.abs(ref).max())


def test_remove_owner_and_capacity(rng) -> None:
    lam, amp = random_partials(rng, 50)
    bank = OscillatorBank(100, owners=4)
    bank.add(lam, amp, owner=1)
    bank.add(lam, amp, owner=2)
    assert bank.remove_owner(1) == 50 and set(bank.owner[: bank.count].tolist()) == {2}
    with pytest.raises(ParameterError, match="oscillator bank full: 50 \\+ 60 partials > capacity 100"):
        bank.add(*random_partials(rng, 60), owner=3)


def test_changing_decay_mid_way(rng) -> None:
    lam, amp = random_partials(rng, 20)
    bank = OscillatorBank(20, owners=4, max_block=256)
    bank.add(lam, amp, owner=0)
    first = render(bank, 1000, 256)
    damped = lam - 50.0 / FS  # a damper adds 50 1/s of decay
    bank.retune(0, partial_tables(damped, split=bank.split, max_block=256))
    second = render(bank, 1000, 256)
    ref2 = np.real(np.exp(np.outer(np.arange(1000), damped)) @ (amp * np.exp(lam * 1000)))
    np.testing.assert_allclose(first, exact(lam, amp, 0, 1000), atol=1e-5)
    np.testing.assert_allclose(second, ref2, atol=1e-5)


def test_retune_and_add_inside_a_block_with_corrections(rng) -> None:
    """An event at sample ``at`` of a block already rendered whole: the corrected block
    equals rendering the two segments around the event with the change in between."""
    lam, amp = random_partials(rng, 30)
    damped = lam - 80.0 / FS
    new_lam, new_amp = random_partials(rng, 10)
    at = 101
    # Reference: render 0..at, change, render at..256 (states advanced in between).
    ref_bank = OscillatorBank(64, owners=4, max_block=256)
    ref_bank.add(lam, amp, owner=0)
    ref = np.zeros(256)
    ref_bank.render(ref, at)
    ref_bank.retune(0, partial_tables(damped, split=ref_bank.split, max_block=256))
    ref_bank.add(new_lam, new_amp, owner=1)
    ref_bank.render(ref[at:], 256 - at)
    # One pass over the block, then corrections from ``at`` on.
    bank = OscillatorBank(64, owners=4, max_block=256)
    bank.add(lam, amp, owner=0)
    out = np.zeros(256)
    bank.render_segment(out, 0, 256)
    bank.retune(0, partial_tables(damped, split=bank.split, max_block=256), at, correct=(out, 256))
    # new_amp is the amplitude at sample ``at``; add_tables refers it back to the block start.
    bank.add_tables(partial_tables(new_lam, split=bank.split, max_block=256), new_amp, owner=1,
                    at=at, correct=(out, 256))
    bank.advance(256)
    np.testing.assert_allclose(out, ref, atol=1e-5 * np.abs(ref).max())
    # And the states go on alike.
    a, b = np.zeros(256), np.zeros(256)
    ref_bank.render(a, 256)
    bank.render(b, 256)
    np.testing.assert_allclose(b, a, atol=1e-5 * np.abs(a).max())


def test_owner_counts_follow_adds_culls_and_removals(rng) -> None:
    bank = OscillatorBank(200, owners=4)
    lam, amp = random_partials(rng, 30)
    amp[:10] *= 1e-9
    bank.add(lam, amp, owner=1)
    bank.add(lam, np.ones(30) + 0j, owner=2)
    assert bank.owner_counts.tolist() == [0, 30, 30, 0]
    bank.cull(1e-5)
    assert bank.owner_counts.tolist() == [0, 20, 30, 0]
    bank.remove_owner(2)
    assert bank.owner_counts.tolist() == [0, 20, 0, 0]
    np.testing.assert_array_equal(np.bincount(bank.owner[: bank.count], minlength=4), bank.owner_counts)


@given(st.lists(st.booleans(), max_size=300))
def test_select_equals_numpy_compress(mask) -> None:
    """The bank's allocation-free selection against numpy's own (np.compress)."""
    mask = np.array(mask, dtype=bool)
    values = np.arange(len(mask)) * 7 + 3
    out = np.full(len(mask) + 1, -1, dtype=np.int64)
    scratch = np.zeros((2, len(mask) + 1), dtype=np.int64)
    h = _select(mask, values, out, scratch[0], scratch[1])
    np.testing.assert_array_equal(out[:h], np.compress(mask, values))


def test_directory_follows_adds_culls_removals_and_moves(rng) -> None:
    """After any mix of adds, culls and removals, each owner's slots from the directory are
    exactly the slots holding its partials (checked against a search of ``owner``), and the
    sum still equals direct evaluation of the surviving partials."""
    owners = 12
    bank = OscillatorBank(600, owners=owners, max_block=256)
    for step in range(200):
        v = int(rng.integers(owners))
        action = rng.integers(3)
        if action == 0 and not bank.owner_counts[v]:
            n = int(rng.integers(1, 60))
            if bank.count + n <= bank.capacity:
                lam, amp = random_partials(rng, n)
                amp[rng.uniform(size=n) < 0.3] *= 1e-8  # some for the next cull
                bank.add(lam, amp, owner=v)
        elif action == 1:
            bank.cull(1e-5)
        else:
            bank.remove_owner(v)
        k = bank.count
        for w in range(owners):
            got = np.sort(bank.owner_slots(w))
            np.testing.assert_array_equal(got, np.flatnonzero(bank.owner[:k] == w), err_msg=f"step {step}")
        np.testing.assert_array_equal(np.bincount(bank.owner[:k], minlength=owners), bank.owner_counts)
    # The partials kept are the right ones: the bank's sum against their exact sum.
    k = bank.count
    assert k > 50
    lam, amp = bank.lam[:k].copy(), bank.state[:k].copy()
    np.testing.assert_allclose(render(bank, 512, 256), exact(lam, amp, 0, 512), atol=1e-5 * np.abs(amp).sum())


def test_owner_ids_are_checked() -> None:
    bank = OscillatorBank(10, owners=2)
    bank.add(np.full(3, -1e-4 + 0.1j), np.ones(3, dtype=complex), owner=1)
    with pytest.raises(ParameterError, match="owner 2 must be in 0..1"):
        bank.add(np.full(3, -1e-4 + 0.1j), np.ones(3, dtype=complex), owner=2)
    with pytest.raises(ParameterError, match="owner 1 still has 3 partials"):
        bank.add(np.full(3, -1e-4 + 0.1j), np.ones(3, dtype=complex), owner=1)
    bank.remove_owner(1)
    assert bank.add(np.full(2, -1e-4 + 0.1j), np.ones(2, dtype=complex), owner=1) == 0  # none left: it may add again
