"""Ingest: bytes from the rig or the control socket into the pipeline.

This is the one path that the live loop and a replay share: the same bytes,
in the same order, give the same pipeline calls. Validation happens here,
once; a bad message is counted (by reason) and logged, never raised.

Control requests are the operator's, not the rig's: a refused request is
counted apart from bad input data (:attr:`Ingest.control_refused`) and
answered with a reason, and nothing a request carries can end the loop or
replace the installed model with one that does not fit the session.

Control commands carry the requester's own sequence numbers, which mean
nothing to the session, so ingest renumbers the commands it hands to the
pipeline on one ``control`` stream (``status`` and ``load_model`` are
answered here and take no number, so they never show as a gap); the
watchdog's stall command is recorded as a control request for the same
reason, so that a replay disarms at the same point of the data. A rig frame
under the control stream's name is refused: its numbers could otherwise make
an operator's command look stale, dropped while its reply says ok.
"""

from __future__ import annotations

import dataclasses
import logging
import os
import stat

from decoder.messages import ControlCommand
from decoder.session.outputs import Notice, StepOutput
from decoder.session.pipeline import Pipeline
from decoder.session.steps import model_problem
from decoder.session.streams import CONTROL_STREAM
from decoder.encoding.place_model import ModelFileError, PlaceModel
from rig_adapters.wire import protocol
from rig_adapters.wire.framing import readable_envelope

log = logging.getLogger(__name__)

#: Recorder channels: which socket a recorded message came in on or went out of.
CHANNEL_RIG, CHANNEL_CONTROL, CHANNEL_EVENTS = "rig", "control", "events"

#: A dry run's events: recorded in the session log, never published.
CHANNEL_DRY_RUN_EVENTS = "events_dry_run"

#: The parts of a multipart control request: recorded, refused, never replayed.
CHANNEL_CONTROL_REFUSED = "control_refused"

#: Largest control request answered (bytes). The longest valid request, a
#: ``load_model`` with a path of the protocol's longest string, is under 4.2 KiB.
MAX_CONTROL_BYTES = 64 * 1024

#: Arguments each control command takes, with their type; anything else is refused.
CONTROL_ARGS: dict[str, dict[str, type]] = {
    "start_learning": {},
    "stop_learning": {},
    "fit": {},
    "load_model": {"path": str},
    "arm": {},
    "disarm": {"reason": str},
    "status": {},
    "stall": {"stream": str},
}

#: Longest text a refusal quotes from a request (characters).
_QUOTE_CHARS = 120


def _describe(exc: BaseException) -> str:
    """A short sentence for an exception that may come from hostile input (a deep nesting, a huge repr)."""
    try:
        text = str(exc)
    except Exception:  # noqa: BLE001 - building the text of a hostile frame's error may itself fail
        text = ""
    if len(text) > 2 * _QUOTE_CHARS:
        text = text[: 2 * _QUOTE_CHARS] + "..."
    return f"{type(exc).__name__}: {text}" if text else type(exc).__name__


def _quote(value: object) -> str:
    """A bounded description of a request's value: its type, and its text if it is a short string."""
    if isinstance(value, str):
        return repr(value[:_QUOTE_CHARS] + ("..." if len(value) > _QUOTE_CHARS else ""))
    return f"a value of type {type(value).__name__}"


class Ingest:
    """Turns recorded or received bytes into pipeline outputs.

    Parameters
    ----------
    pipeline : Pipeline
    model_override : PlaceModel, optional
        For replays: answer every ``load_model`` command with this model
        instead of reading the file the live run named.

    Attributes
    ----------
    control_refused : dict of str to int
        Refused control requests by reason: ``multipart``, ``oversized``,
        ``unreadable`` (the codec could not read it), ``bad_argument``,
        ``bad_model``, ``refused`` (the session refused it in its state),
        ``internal``.
    """

    def __init__(self, pipeline: Pipeline, model_override: PlaceModel | None = None) -> None:
        self.pipeline = pipeline
        self.model_override = model_override
        self.control_refused: dict[str, int] = {}
        self._control_seq = 0

    def rig_bytes(self, payload: bytes) -> list[StepOutput | Notice]:
        """One frame from the rig SUB socket."""
        try:
            msg = protocol.decode(payload)
        except protocol.ProtocolError as exc:
            log.warning("bad rig message (%s): %s", exc.reason, exc.detail)
            return self._rejected(exc.reason, payload)
        except Exception as exc:  # noqa: BLE001 - the loop's edge: no frame may end it
            log.warning("bad rig message (bad_field): the codec failed on it (%s)", _describe(exc))
            return self._rejected("bad_field", payload)
        if msg.source == CONTROL_STREAM:
            # Operator commands are numbered on this stream: a rig frame under its name could make one stale.
            log.warning("refused a rig message under the control stream's name %r", CONTROL_STREAM)
            return self.pipeline.count_bad_message("bad_field")
        if type(msg) is ControlCommand:
            # Control belongs on the control socket; a rig cannot arm the loop.
            log.warning("refused a control command that came on the rig stream from %r", msg.source)
            return self.pipeline.count_bad_message("unknown_kind", msg.source, msg.seq)
        return self.pipeline.on_message(msg)

    def _rejected(self, reason: str, payload: bytes) -> list[StepOutput | Notice]:
        """Count a rejected rig frame, as rejected for its source when its envelope is readable (no gap)."""
        envelope = readable_envelope(payload)
        if envelope is None or envelope[0] == CONTROL_STREAM:
            return self.pipeline.count_bad_message(reason)
        return self.pipeline.count_bad_message(reason, *envelope)

    # -- control ---------------------------------------------------------------------

    def control_bytes(self, payload: bytes) -> tuple[list[StepOutput | Notice], dict]:
        """One request from the control socket; returns the outputs and the reply fields.

        Never raises for anything the request holds: every failure is a
        refusal (``{"ok": False, "error": ..., "reason": ...}``), counted in
        :attr:`control_refused`.
        """
        if len(payload) > MAX_CONTROL_BYTES:
            return self.refuse("oversized", f"the request has {len(payload)} bytes, more than the control "
                                            f"socket's limit of {MAX_CONTROL_BYTES}")
        try:
            cmd = protocol.decode_control_request(payload)
        except protocol.ProtocolError as exc:
            return self.refuse("unreadable", f"the request breaks the protocol ({exc.reason}): {exc.detail}")
        except Exception as exc:  # noqa: BLE001 - a deep nesting or a codec fault must not end the loop
            return self.refuse("unreadable", f"the request could not be read ({_describe(exc)})")
        return self.control(cmd)

    def control(self, cmd: ControlCommand) -> tuple[list[StepOutput | Notice], dict]:
        """Carry out a decoded control command."""
        problem = _argument_problem(cmd)
        if problem is not None:
            return self.refuse("bad_argument", problem)
        if cmd.command == "status":
            return [], {"ok": True, "status": self.status()}
        if cmd.command == "load_model":
            return self._load_model(cmd.args["path"])
        self._control_seq += 1
        cmd = dataclasses.replace(cmd, source=CONTROL_STREAM, seq=self._control_seq)
        return self._answer(self.pipeline.on_message(cmd))

    def refuse(self, reason: str, why: str) -> tuple[list, dict]:
        """Count a refused control request and build its reply."""
        self.control_refused[reason] = self.control_refused.get(reason, 0) + 1
        log.warning("refused a control request (%s): %s", reason, why)
        return [], {"ok": False, "error": why, "reason": reason}

    def status(self) -> dict:
        """The session's status, with the control socket's own counts."""
        return {**self.pipeline.status(), "control": {"refused": dict(self.control_refused)}}

    def _answer(self, outputs: list) -> tuple[list[StepOutput | Notice], dict]:
        refused = [o for o in outputs if isinstance(o, Notice) and o.kind == "refused"]
        if refused:
            _, reply = self.refuse("refused", str(refused[0].detail.get("why", "refused in this state")))
            return outputs, reply
        return outputs, {"ok": True, "status": self.status()}

    def _load_model(self, path: str) -> tuple[list[StepOutput | Notice], dict]:
        if self.model_override is not None:
            model = self.model_override
        else:
            model, why = _read_model_file(path)
            if model is None:
                return self.refuse("bad_model", why)
        why = model_problem(model, self.pipeline.environment, self.pipeline.marks is not None)
        if why is not None:
            return self.refuse("bad_model", f"{_quote(path)}: {why}; the model in use is unchanged")
        return self._answer(self.pipeline.install_model(model, self.pipeline.spike_watermark_s, loaded=True))

    @staticmethod
    def stall_request(stream: str) -> bytes:
        """The control request the watchdog records and feeds when a stream stalls."""
        return protocol.encode_control_request("stall", {"stream": stream}, source="watchdog")


def _argument_problem(cmd: ControlCommand) -> str | None:
    """Why a command's arguments are wrong, or None."""
    allowed = CONTROL_ARGS[cmd.command]
    unknown = sorted(set(cmd.args) - set(allowed))
    if unknown:
        takes = ", ".join(sorted(allowed)) or "no arguments"
        return f"{cmd.command} takes {takes}; got {_quote(unknown[0])}"
    for name, kind in allowed.items():
        if name in cmd.args and type(cmd.args[name]) is not kind:
            return f"{cmd.command}: {name} must be a {kind.__name__}, got {_quote(cmd.args[name])}"
    if cmd.command == "load_model" and not cmd.args.get("path"):
        return "load_model needs path, the model file's path"
    return None


def _read_model_file(path: str) -> tuple[PlaceModel | None, str]:
    """Load a model file, or say why not; never blocks on a FIFO or a device."""
    # os.stat before open: opening a FIFO for reading waits for a writer, for ever.
    try:
        mode = os.stat(path).st_mode
    except (OSError, ValueError) as exc:
        return None, f"cannot read the model file {_quote(path)} ({_describe(exc)})"
    if not stat.S_ISREG(mode):
        return None, (f"{_quote(path)} is not a regular file (a directory, FIFO or device); "
                      "give the path of a saved model file")
    try:
        return PlaceModel.load(path), ""
    except ModelFileError as exc:
        return None, str(exc)
    except Exception as exc:  # noqa: BLE001 - a model file is outside input; a damaged one is a refusal
        log.exception("reading the model file %r failed", path)
        return None, f"the model file {_quote(path)} could not be read ({_describe(exc)})"
