"""Ingest: bytes from the rig or the control socket into the pipeline.

This is the one path that the live loop and a replay share: the same bytes,
in the same order, give the same pipeline calls. Validation happens here,
once; a bad message is counted (by reason) and logged, never raised.

Control commands carry the requester's own sequence numbers, which mean
nothing to the session, so ingest renumbers them on one ``control`` stream;
the watchdog's stall command is recorded as a control request for the same
reason, so that a replay disarms at the same point of the data.
"""

from __future__ import annotations

import dataclasses
import logging

from decoder.messages import ControlCommand, MessageError
from decoder.session.outputs import Notice, StepOutput
from decoder.session.pipeline import Pipeline
from decoder.encoding.place_model import ModelFileError, PlaceModel
from rig_adapters.wire import protocol

log = logging.getLogger(__name__)

#: Recorder channels: which socket a recorded message came in on or went out of.
CHANNEL_RIG, CHANNEL_CONTROL, CHANNEL_EVENTS = "rig", "control", "events"


class Ingest:
    """Turns recorded or received bytes into pipeline outputs.

    Parameters
    ----------
    pipeline : Pipeline
    model_override : PlaceModel, optional
        For replays: answer every ``load_model`` command with this model
        instead of reading the file the live run named.
    """

    def __init__(self, pipeline: Pipeline, model_override: PlaceModel | None = None) -> None:
        self.pipeline = pipeline
        self.model_override = model_override
        self._control_seq = 0

    def rig_bytes(self, payload: bytes) -> list[StepOutput | Notice]:
        """One frame from the rig SUB socket."""
        try:
            msg = protocol.decode(payload)
        except protocol.ProtocolError as exc:
            self.pipeline.count_bad_message(exc.reason)
            log.warning("bad rig message (%s): %s", exc.reason, exc.detail)
            return []
        if type(msg) is ControlCommand:
            # Control belongs on the control socket; a rig cannot arm the loop.
            self.pipeline.count_bad_message("unknown_kind")
            log.warning("refused a control command that came on the rig stream from %r", msg.source)
            return []
        return self.pipeline.on_message(msg)

    def control_bytes(self, payload: bytes) -> tuple[list[StepOutput | Notice], dict]:
        """One request from the control socket; returns the outputs and the reply fields."""
        try:
            cmd = protocol.decode_control_request(payload)
        except (protocol.ProtocolError, MessageError) as exc:
            reason = getattr(exc, "reason", "bad_field")
            self.pipeline.count_bad_message(reason)
            log.warning("bad control request (%s): %s", reason, exc)
            return [], {"ok": False, "error": str(exc)}
        return self.control(cmd)

    def control(self, cmd: ControlCommand) -> tuple[list[StepOutput | Notice], dict]:
        """Carry out a decoded control command."""
        self._control_seq += 1
        cmd = dataclasses.replace(cmd, source="control", seq=self._control_seq)
        if cmd.command == "status":
            return [], {"ok": True, "status": self.pipeline.status()}
        if cmd.command == "load_model":
            try:
                model = self.model_override or PlaceModel.load(cmd.args.get("path", ""))
            except (ModelFileError, OSError) as exc:
                return [], {"ok": False, "error": str(exc)}
            outputs = self.pipeline.install_model(model, self.pipeline.spike_watermark_s, loaded=True)
        else:
            outputs = self.pipeline.on_message(cmd)
        refused = [o for o in outputs if isinstance(o, Notice) and o.kind == "refused"]
        if refused:
            return outputs, {"ok": False, "error": refused[0].detail.get("why", "refused")}
        return outputs, {"ok": True, "status": self.pipeline.status()}

    @staticmethod
    def stall_request(stream: str) -> bytes:
        """The control request the watchdog records and feeds when a stream stalls."""
        return protocol.encode_control_request("stall", {"stream": stream}, source="watchdog")
