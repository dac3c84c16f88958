"""Hostile frames for the fault probe (bench/faults.py): structured, random and mutated.

Three generators, each seeded, none of them touching a socket:

- :func:`structured_frames`: hypothesis builds input maps from the protocol's
  own keys and from the session's real frames, with values swapped for
  arbitrary MessagePack values (nested lists and maps, huge integers, NaN,
  bytes as keys);
- :func:`random_frames`: random bytes, mostly short, some starting with a
  valid MessagePack map header so that they get past the first byte;
- :func:`mutated_frames`: real frames of the session (renamed to an invented
  source first) with bytes flipped, cut, repeated or spliced together.

Throwing generated garbage at a parser is common practice for fuzzing (no
single published source). Frames whose readable envelope would claim one of
the session's sources are left out (:func:`keep_off_session`), so that the
valid session interleaved with them must decode to the same events as
without them; :func:`spoofed_frame` makes the session's own sources' broken
frames on purpose, numbered so that they take no number from the session.
"""

from __future__ import annotations

import dataclasses

import msgpack
import numpy as np
from hypothesis import HealthCheck, Phase, given, settings
from hypothesis import seed as hypothesis_seed
from hypothesis import strategies as st

from rig_adapters.wire import protocol
from rig_adapters.wire.framing import readable_envelope
from rig_adapters.wire.protocol import INPUT_KEYS

ALL_KEYS = sorted(set().union(*(spec.allowed for spec in INPUT_KEYS.values())))
KINDS = sorted(INPUT_KEYS)

_leaves = st.one_of(
    st.none(),
    st.booleans(),
    st.integers(min_value=-(2**63), max_value=2**64 - 1),  # the MessagePack integer range (msgpack spec.md)
    st.floats(allow_nan=True, allow_infinity=True),
    st.text(max_size=40),
    st.binary(max_size=64),
)
_values = st.recursive(
    _leaves,
    lambda inner: st.one_of(st.lists(inner, max_size=5),
                            st.dictionaries(st.one_of(st.text(max_size=6), st.binary(max_size=3)), inner, max_size=4)),
    max_leaves=12,
)


def structured_frames(templates: list[dict], n: int, seed: int) -> list[bytes]:
    """``n`` frames: a template map with 1 to 4 keys replaced, removed or added, packed.

    Parameters
    ----------
    templates : list of dict
        Valid input maps (already renamed off the session's sources).
    n : int
    seed : int
    """
    out: list[bytes] = []

    @st.composite
    def frame(draw) -> bytes:
        m = dict(draw(st.sampled_from(templates)))
        for _ in range(draw(st.integers(1, 4))):
            key = draw(st.one_of(st.sampled_from(ALL_KEYS), st.sampled_from(list(m)), st.text(max_size=6),
                                 st.binary(min_size=1, max_size=3)))
            choice = draw(st.integers(0, 5))
            if choice == 0:
                m.pop(key, None)
            elif choice == 1 and key in ("k",):
                m[key] = draw(st.sampled_from(KINDS))
            else:
                m[key] = draw(_values)
        return msgpack.packb(m, use_bin_type=True)

    @hypothesis_seed(seed)
    @settings(max_examples=n, database=None, deadline=None, phases=[Phase.generate],
              suppress_health_check=list(HealthCheck))
    @given(frame())
    def collect(data: bytes) -> None:
        out.append(data)

    collect()
    return out[:n]


def random_frames(n: int, rng: np.random.Generator) -> list[bytes]:
    """``n`` frames of random bytes; a third open with a MessagePack map header (0x80-0x8f, fixmap)."""
    out = []
    for _ in range(n):
        size = int(min(rng.geometric(1 / 64), 4096))
        data = rng.bytes(size)
        if rng.random() < 1 / 3:
            data = bytes([0x80 | int(rng.integers(1, 9))]) + data
        out.append(data)
    return out


def mutated_frames(valid: list[bytes], n: int, rng: np.random.Generator) -> list[bytes]:
    """``n`` mutations of ``valid`` frames: bit flips, cuts, repeats, splices, byte runs."""
    out = []
    for _ in range(n):
        data = bytearray(valid[int(rng.integers(len(valid)))])
        how = int(rng.integers(6))
        if how == 0:  # flip a few bits
            for _ in range(int(rng.integers(1, 4))):
                i = int(rng.integers(len(data)))
                data[i] ^= 1 << int(rng.integers(8))
        elif how == 1:  # cut short
            data = data[: int(rng.integers(len(data)))]
        elif how == 2:  # repeat a slice
            i, j = sorted(int(v) for v in rng.integers(len(data), size=2))
            data = data[:j] + data[i:j] + data[j:]
        elif how == 3:  # splice two frames
            other = valid[int(rng.integers(len(valid)))]
            data = data[: int(rng.integers(len(data)))] + other[int(rng.integers(len(other))):]
        elif how == 4:  # overwrite a run with one byte value (0x00, 0xff, 0xc1 or a random one)
            i = int(rng.integers(len(data)))
            value = int(rng.choice([0x00, 0xFF, 0xC1, int(rng.integers(256))]))
            data[i: i + int(rng.integers(1, 9))] = bytes([value]) * min(8, len(data) - i)
        else:  # random bytes inserted
            i = int(rng.integers(len(data) + 1))
            data = data[:i] + rng.bytes(int(rng.integers(1, 16))) + data[i:]
        out.append(bytes(data))
    return out


def renamed(messages: list, n_sources: int = 7) -> list[bytes]:
    """The session's messages encoded under invented source names (``fuzz0`` ...), their templates for mutation."""
    return [protocol.encode(dataclasses.replace(m, source=f"fuzz{i % n_sources}")) for i, m in enumerate(messages)]


def keep_off_session(frames: list[bytes], session_sources: set[str]) -> list[bytes]:
    """The frames whose readable envelope, if any, names no session source.

    A frame under a session source's name with a readable envelope would take
    that source's sequence numbers: that is a spoofed source, a fault of its
    own (:func:`spoofed_frames`), not garbage.
    """
    kept = []
    for data in frames:
        envelope = readable_envelope(data)
        if envelope is None or envelope[0] not in session_sources:
            kept.append(data)
    return kept


def spoofed_frame(message, last_seq: int, how: int) -> bytes:
    """A broken copy of a session ``message`` under its own source, numbered ``last_seq`` (a repeat, no gap)."""
    m = msgpack.unpackb(protocol.encode(dataclasses.replace(message, seq=last_seq)), raw=False)
    key = ("t", "v", "k", "iw", "zz")[how % 5]
    m[key] = [[[[["deep"]]]]] if how % 2 else "not a value"
    return msgpack.packb(m, use_bin_type=True)
