"""The wire protocol: typed messages to MessagePack bytes and back.

Every message is one ZeroMQ frame holding one MessagePack map. The full
specification, with a table of every key, is ``PROTOCOL.md`` beside this
file; this module is its reference implementation and the one to import.

Inputs (rig -> placeloop) decode into the typed messages of
:mod:`decoder.messages`; outputs (placeloop -> subscribers) are plain dicts
with the Python names used by :func:`encode_event` and :func:`encode_state`.
Whatever the bytes, the only exception a decoder raises is
:class:`ProtocolError`, whose ``reason`` is one of :data:`REASONS`, a short
fixed category that the shell counts, and whose ``detail`` is a sentence a
rig developer can act on, short whatever the frame held.

Arrays travel as MessagePack ``bin`` holding little-endian values, read with
``numpy.frombuffer`` so that a batch of thousands of spikes costs no Python
loop; simple rigs may send plain MessagePack arrays of numbers instead.

The parts: :mod:`~rig_adapters.wire.framing` (limits, unpacking, the
envelope, :class:`ProtocolError`), :mod:`~rig_adapters.wire.inputs` (input
kinds and control requests), :mod:`~rig_adapters.wire.outputs` (events,
states and control replies).
"""

from decoder.messages import REASONS
from rig_adapters.wire.framing import (
    MAX_FRAME_BYTES,
    MAX_MAP_LEN,
    MAX_OUTPUT_FRAME_BYTES,
    MAX_STR_BYTES,
    PROTOCOL_VERSION,
    ProtocolError,
)
from rig_adapters.wire.inputs import (
    EXTENSION_PREFIX,
    INPUT_KEYS,
    INPUT_KINDS,
    decode,
    decode_control_request,
    encode,
    encode_control_request,
)
from rig_adapters.wire.outputs import (
    OUTPUT_KINDS,
    REPLY_KIND,
    RIPPLE_VIEW_MIN_GAP_S,
    RIPPLE_VIEW_PERIOD_S,
    decode_control_reply,
    decode_output,
    encode_control_reply,
    encode_event,
    encode_state,
    ripple_view,
)

__all__ = [
    "EXTENSION_PREFIX",
    "INPUT_KEYS",
    "INPUT_KINDS",
    "MAX_FRAME_BYTES",
    "MAX_MAP_LEN",
    "MAX_OUTPUT_FRAME_BYTES",
    "MAX_STR_BYTES",
    "OUTPUT_KINDS",
    "PROTOCOL_VERSION",
    "REASONS",
    "REPLY_KIND",
    "RIPPLE_VIEW_MIN_GAP_S",
    "RIPPLE_VIEW_PERIOD_S",
    "ProtocolError",
    "decode",
    "decode_control_reply",
    "decode_control_request",
    "decode_output",
    "encode",
    "encode_control_reply",
    "encode_control_request",
    "encode_event",
    "encode_state",
    "ripple_view",
]
