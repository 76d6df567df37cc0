from google.protobuf.internal import enum_type_wrapper as _enum_type_wrapper
from google.protobuf import descriptor as _descriptor
from google.protobuf import message as _message
from collections.abc import Mapping as _Mapping
from typing import ClassVar as _ClassVar, Optional as _Optional, Union as _Union

DESCRIPTOR: _descriptor.FileDescriptor

class Role(int, metaclass=_enum_type_wrapper.EnumTypeWrapper):
    __slots__ = ()
    ROLE_UNSPECIFIED: _ClassVar[Role]
    ROLE_GARBLER: _ClassVar[Role]
    ROLE_EVALUATOR: _ClassVar[Role]

class AbortReason(int, metaclass=_enum_type_wrapper.EnumTypeWrapper):
    __slots__ = ()
    ABORT_REASON_UNSPECIFIED: _ClassVar[AbortReason]
    ABORT_REASON_PROTOCOL_VERSION: _ClassVar[AbortReason]
    ABORT_REASON_MANIFEST_MISMATCH: _ClassVar[AbortReason]
    ABORT_REASON_SESSION_MISMATCH: _ClassVar[AbortReason]
    ABORT_REASON_SESSION_REFUSED: _ClassVar[AbortReason]
    ABORT_REASON_UNEXPECTED_FRAME: _ClassVar[AbortReason]
    ABORT_REASON_MALFORMED_FRAME: _ClassVar[AbortReason]
    ABORT_REASON_OT_FAILURE: _ClassVar[AbortReason]
    ABORT_REASON_INVALID_OUTPUT: _ClassVar[AbortReason]
    ABORT_REASON_TRANSCRIPT_MISMATCH: _ClassVar[AbortReason]
    ABORT_REASON_BAD_SIGNATURE: _ClassVar[AbortReason]
    ABORT_REASON_DEADLINE: _ClassVar[AbortReason]
    ABORT_REASON_CANCELLED: _ClassVar[AbortReason]
    ABORT_REASON_CONNECTION_LOST: _ClassVar[AbortReason]
    ABORT_REASON_INTERNAL: _ClassVar[AbortReason]
    ABORT_REASON_PEER_SHUTDOWN: _ClassVar[AbortReason]
    ABORT_REASON_RESUME_REFUSED: _ClassVar[AbortReason]

class RefusalReason(int, metaclass=_enum_type_wrapper.EnumTypeWrapper):
    __slots__ = ()
    REFUSAL_REASON_UNSPECIFIED: _ClassVar[RefusalReason]
    REFUSAL_REASON_JOB_NOT_CONFIGURED: _ClassVar[RefusalReason]
    REFUSAL_REASON_DIGEST_MISMATCH: _ClassVar[RefusalReason]
    REFUSAL_REASON_OUTSIDE_WINDOW: _ClassVar[RefusalReason]
    REFUSAL_REASON_BUSY: _ClassVar[RefusalReason]
    REFUSAL_REASON_ROLE_MISMATCH: _ClassVar[RefusalReason]
    REFUSAL_REASON_MALFORMED: _ClassVar[RefusalReason]
    REFUSAL_REASON_INPUT_UNAVAILABLE: _ClassVar[RefusalReason]
    REFUSAL_REASON_SHUTTING_DOWN: _ClassVar[RefusalReason]
    REFUSAL_REASON_PROTOCOL_VERSION: _ClassVar[RefusalReason]
    REFUSAL_REASON_BOTH_INITIATE: _ClassVar[RefusalReason]
    REFUSAL_REASON_INPUT_INVALID: _ClassVar[RefusalReason]
    REFUSAL_REASON_BUDGET_EXHAUSTED: _ClassVar[RefusalReason]
ROLE_UNSPECIFIED: Role
ROLE_GARBLER: Role
ROLE_EVALUATOR: Role
ABORT_REASON_UNSPECIFIED: AbortReason
ABORT_REASON_PROTOCOL_VERSION: AbortReason
ABORT_REASON_MANIFEST_MISMATCH: AbortReason
ABORT_REASON_SESSION_MISMATCH: AbortReason
ABORT_REASON_SESSION_REFUSED: AbortReason
ABORT_REASON_UNEXPECTED_FRAME: AbortReason
ABORT_REASON_MALFORMED_FRAME: AbortReason
ABORT_REASON_OT_FAILURE: AbortReason
ABORT_REASON_INVALID_OUTPUT: AbortReason
ABORT_REASON_TRANSCRIPT_MISMATCH: AbortReason
ABORT_REASON_BAD_SIGNATURE: AbortReason
ABORT_REASON_DEADLINE: AbortReason
ABORT_REASON_CANCELLED: AbortReason
ABORT_REASON_CONNECTION_LOST: AbortReason
ABORT_REASON_INTERNAL: AbortReason
ABORT_REASON_PEER_SHUTDOWN: AbortReason
ABORT_REASON_RESUME_REFUSED: AbortReason
REFUSAL_REASON_UNSPECIFIED: RefusalReason
REFUSAL_REASON_JOB_NOT_CONFIGURED: RefusalReason
REFUSAL_REASON_DIGEST_MISMATCH: RefusalReason
REFUSAL_REASON_OUTSIDE_WINDOW: RefusalReason
REFUSAL_REASON_BUSY: RefusalReason
REFUSAL_REASON_ROLE_MISMATCH: RefusalReason
REFUSAL_REASON_MALFORMED: RefusalReason
REFUSAL_REASON_INPUT_UNAVAILABLE: RefusalReason
REFUSAL_REASON_SHUTTING_DOWN: RefusalReason
REFUSAL_REASON_PROTOCOL_VERSION: RefusalReason
REFUSAL_REASON_BOTH_INITIATE: RefusalReason
REFUSAL_REASON_INPUT_INVALID: RefusalReason
REFUSAL_REASON_BUDGET_EXHAUSTED: RefusalReason

class Hello(_message.Message):
    __slots__ = ("protocol_version", "manifest_digest", "session_id", "role", "program_digest", "signature")
    PROTOCOL_VERSION_FIELD_NUMBER: _ClassVar[int]
    MANIFEST_DIGEST_FIELD_NUMBER: _ClassVar[int]
    SESSION_ID_FIELD_NUMBER: _ClassVar[int]
    ROLE_FIELD_NUMBER: _ClassVar[int]
    PROGRAM_DIGEST_FIELD_NUMBER: _ClassVar[int]
    SIGNATURE_FIELD_NUMBER: _ClassVar[int]
    protocol_version: int
    manifest_digest: bytes
    session_id: bytes
    role: Role
    program_digest: bytes
    signature: bytes
    def __init__(self, protocol_version: _Optional[int] = ..., manifest_digest: _Optional[bytes] = ..., session_id: _Optional[bytes] = ..., role: _Optional[_Union[Role, str]] = ..., program_digest: _Optional[bytes] = ..., signature: _Optional[bytes] = ...) -> None: ...

class BaseOT(_message.Message):
    __slots__ = ("payload",)
    PAYLOAD_FIELD_NUMBER: _ClassVar[int]
    payload: bytes
    def __init__(self, payload: _Optional[bytes] = ...) -> None: ...

class OTExtension(_message.Message):
    __slots__ = ("payload",)
    PAYLOAD_FIELD_NUMBER: _ClassVar[int]
    payload: bytes
    def __init__(self, payload: _Optional[bytes] = ...) -> None: ...

class GarblerInputLabels(_message.Message):
    __slots__ = ("labels",)
    LABELS_FIELD_NUMBER: _ClassVar[int]
    labels: bytes
    def __init__(self, labels: _Optional[bytes] = ...) -> None: ...

class GarbledTables(_message.Message):
    __slots__ = ("tables",)
    TABLES_FIELD_NUMBER: _ClassVar[int]
    tables: bytes
    def __init__(self, tables: _Optional[bytes] = ...) -> None: ...

class GarblerOutputLabels(_message.Message):
    __slots__ = ("labels",)
    LABELS_FIELD_NUMBER: _ClassVar[int]
    labels: bytes
    def __init__(self, labels: _Optional[bytes] = ...) -> None: ...

class EvaluatorOutputDecoding(_message.Message):
    __slots__ = ("decoding",)
    DECODING_FIELD_NUMBER: _ClassVar[int]
    decoding: bytes
    def __init__(self, decoding: _Optional[bytes] = ...) -> None: ...

class Finish(_message.Message):
    __slots__ = ("transcript_digest", "signature")
    TRANSCRIPT_DIGEST_FIELD_NUMBER: _ClassVar[int]
    SIGNATURE_FIELD_NUMBER: _ClassVar[int]
    transcript_digest: bytes
    signature: bytes
    def __init__(self, transcript_digest: _Optional[bytes] = ..., signature: _Optional[bytes] = ...) -> None: ...

class TablesAck(_message.Message):
    __slots__ = ("frames",)
    FRAMES_FIELD_NUMBER: _ClassVar[int]
    frames: int
    def __init__(self, frames: _Optional[int] = ...) -> None: ...

class Resume(_message.Message):
    __slots__ = ("protocol_version", "session_id", "role", "attempt", "frames_received", "signature")
    PROTOCOL_VERSION_FIELD_NUMBER: _ClassVar[int]
    SESSION_ID_FIELD_NUMBER: _ClassVar[int]
    ROLE_FIELD_NUMBER: _ClassVar[int]
    ATTEMPT_FIELD_NUMBER: _ClassVar[int]
    FRAMES_RECEIVED_FIELD_NUMBER: _ClassVar[int]
    SIGNATURE_FIELD_NUMBER: _ClassVar[int]
    protocol_version: int
    session_id: bytes
    role: Role
    attempt: int
    frames_received: int
    signature: bytes
    def __init__(self, protocol_version: _Optional[int] = ..., session_id: _Optional[bytes] = ..., role: _Optional[_Union[Role, str]] = ..., attempt: _Optional[int] = ..., frames_received: _Optional[int] = ..., signature: _Optional[bytes] = ...) -> None: ...

class Abort(_message.Message):
    __slots__ = ("reason", "message")
    REASON_FIELD_NUMBER: _ClassVar[int]
    MESSAGE_FIELD_NUMBER: _ClassVar[int]
    reason: AbortReason
    message: str
    def __init__(self, reason: _Optional[_Union[AbortReason, str]] = ..., message: _Optional[str] = ...) -> None: ...

class Frame(_message.Message):
    __slots__ = ("hello", "base_ot", "ot_extension", "garbler_input_labels", "garbled_tables", "garbler_output_labels", "evaluator_output_decoding", "finish", "abort", "tables_ack", "resume")
    HELLO_FIELD_NUMBER: _ClassVar[int]
    BASE_OT_FIELD_NUMBER: _ClassVar[int]
    OT_EXTENSION_FIELD_NUMBER: _ClassVar[int]
    GARBLER_INPUT_LABELS_FIELD_NUMBER: _ClassVar[int]
    GARBLED_TABLES_FIELD_NUMBER: _ClassVar[int]
    GARBLER_OUTPUT_LABELS_FIELD_NUMBER: _ClassVar[int]
    EVALUATOR_OUTPUT_DECODING_FIELD_NUMBER: _ClassVar[int]
    FINISH_FIELD_NUMBER: _ClassVar[int]
    ABORT_FIELD_NUMBER: _ClassVar[int]
    TABLES_ACK_FIELD_NUMBER: _ClassVar[int]
    RESUME_FIELD_NUMBER: _ClassVar[int]
    hello: Hello
    base_ot: BaseOT
    ot_extension: OTExtension
    garbler_input_labels: GarblerInputLabels
    garbled_tables: GarbledTables
    garbler_output_labels: GarblerOutputLabels
    evaluator_output_decoding: EvaluatorOutputDecoding
    finish: Finish
    abort: Abort
    tables_ack: TablesAck
    resume: Resume
    def __init__(self, hello: _Optional[_Union[Hello, _Mapping]] = ..., base_ot: _Optional[_Union[BaseOT, _Mapping]] = ..., ot_extension: _Optional[_Union[OTExtension, _Mapping]] = ..., garbler_input_labels: _Optional[_Union[GarblerInputLabels, _Mapping]] = ..., garbled_tables: _Optional[_Union[GarbledTables, _Mapping]] = ..., garbler_output_labels: _Optional[_Union[GarblerOutputLabels, _Mapping]] = ..., evaluator_output_decoding: _Optional[_Union[EvaluatorOutputDecoding, _Mapping]] = ..., finish: _Optional[_Union[Finish, _Mapping]] = ..., abort: _Optional[_Union[Abort, _Mapping]] = ..., tables_ack: _Optional[_Union[TablesAck, _Mapping]] = ..., resume: _Optional[_Union[Resume, _Mapping]] = ...) -> None: ...

class RunProposal(_message.Message):
    __slots__ = ("protocol_version", "job", "manifest_digest", "session_id", "scheduled_for_us", "role", "attempt", "trigger")
    PROTOCOL_VERSION_FIELD_NUMBER: _ClassVar[int]
    JOB_FIELD_NUMBER: _ClassVar[int]
    MANIFEST_DIGEST_FIELD_NUMBER: _ClassVar[int]
    SESSION_ID_FIELD_NUMBER: _ClassVar[int]
    SCHEDULED_FOR_US_FIELD_NUMBER: _ClassVar[int]
    ROLE_FIELD_NUMBER: _ClassVar[int]
    ATTEMPT_FIELD_NUMBER: _ClassVar[int]
    TRIGGER_FIELD_NUMBER: _ClassVar[int]
    protocol_version: int
    job: str
    manifest_digest: bytes
    session_id: bytes
    scheduled_for_us: int
    role: Role
    attempt: int
    trigger: str
    def __init__(self, protocol_version: _Optional[int] = ..., job: _Optional[str] = ..., manifest_digest: _Optional[bytes] = ..., session_id: _Optional[bytes] = ..., scheduled_for_us: _Optional[int] = ..., role: _Optional[_Union[Role, str]] = ..., attempt: _Optional[int] = ..., trigger: _Optional[str] = ...) -> None: ...

class RunAnswer(_message.Message):
    __slots__ = ("accepted", "reason", "message")
    ACCEPTED_FIELD_NUMBER: _ClassVar[int]
    REASON_FIELD_NUMBER: _ClassVar[int]
    MESSAGE_FIELD_NUMBER: _ClassVar[int]
    accepted: bool
    reason: RefusalReason
    message: str
    def __init__(self, accepted: _Optional[bool] = ..., reason: _Optional[_Union[RefusalReason, str]] = ..., message: _Optional[str] = ...) -> None: ...
