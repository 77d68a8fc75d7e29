# SPDX-License-Identifier: Apache-2.0
"""rosbag2 files with MCAP storage: a chunked writer and a reader that survives a crash.

Writing (`BagWriter`) uses the ``rosbags`` library's rosbag2 writer (format version 9, MCAP
storage) with a storage class that closes a chunk at ``chunk_size`` bytes or when its
oldest message is ``chunk_duration`` old, compresses it (``none``, ``zstd`` or ``lz4``, the
MCAP chunk compressions) and flushes it to the file at once, so a crashed recorder loses
at most the chunk it was filling. Messages are written as given: serialised CDR bytes.

Reading (`read_bag`) takes a bag folder (with ``metadata.yaml``) or an ``.mcap`` file and
returns the selected topics in memory (`TopicData`: receive times, raw bytes, offered QoS).
A bag whose recorder did not close it (no ``metadata.yaml``, or an MCAP file without its
summary and footer) is read record by record with the ``mcap`` package up to the last
complete chunk; `Bag.recovered` then says what was lost. `repair_bag` writes such a bag
out again as a closed, indexed bag that any reader opens.

``rclpy.serialization.serialize_message`` returns buffers with trailing bytes beyond the
CDR message (seen: 4 to 76 bytes); `decode` ignores trailing bytes, and bags written here
from replayed data are serialised with ``rosbags`` (exact sizes).
"""
from __future__ import annotations

import functools
import math
import struct
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, Callable, Iterable, Sequence

import numpy as np

COMPRESSIONS = ("none", "zstd", "lz4")
MIN_CHUNK = 1024
MAX_CHUNK = 2 ** 20  # the rosbags MCAP writer also closes a chunk at 1 MiB


class BagError(ValueError):
    """A bag is missing, unreadable, lacks a topic, or a setting of the writer is invalid."""


@functools.lru_cache(maxsize=1)
def typestore() -> Any:
    """The ``rosbags`` type store for ROS 2 Jazzy message definitions."""
    from rosbags.typesys import Stores, get_typestore
    return get_typestore(Stores.ROS2_JAZZY)


def decode(raw: bytes | memoryview, msgtype: str) -> Any:
    """CDR bytes -> ``rosbags`` message object, ignoring bytes after the message's end."""
    from rosbags.serde import SerdeError
    store = typestore()
    if len(raw) < 4 or bytes(raw[:2]) not in (b"\x00\x00", b"\x00\x01"):
        raise SerdeError(f"{msgtype}: invalid or unsupported CDR encapsulation")
    msgdef = store.get_msgdef(msgtype)
    func = msgdef.deserialize_cdr_le if raw[1] else msgdef.deserialize_cdr_be
    try:
        message, pos = func(memoryview(raw)[4:], 0, msgdef.cls, store)
    except Exception as exc:  # struct.error, UnicodeDecodeError, ValueError, IndexError
        raise SerdeError(f"{msgtype}: cannot decode: {exc}") from None
    if pos + 4 > len(raw):
        raise SerdeError(f"{msgtype}: message is truncated")
    return message


def encode(message: Any, msgtype: str) -> bytes:
    """``rosbags`` message object -> CDR bytes (little endian, exact size)."""
    return bytes(typestore().serialize_cdr(message, msgtype))


# ---------------------------------------------------------------------------- writing
def _chunk_storage(chunk_size: int, compression: str) -> type:
    """A ``rosbags`` MCAP storage class closing, compressing and flushing chunks as set."""
    from rosbags.rosbag2.storage_mcap import McapWriter
    from rosbags.rosbag2.enums import CompressionMode

    if compression == "zstd":
        try:
            from compression import zstd  # type: ignore[import-not-found]
        except ImportError:
            from backports import zstd  # type: ignore[no-redef]
        compressor = zstd.compress
    elif compression == "lz4":
        import lz4.frame
        compressor = lz4.frame.compress
    else:
        compressor = None

    class ChunkedMcapWriter(McapWriter):
        """MCAP storage: chunk size and compression as set, each chunk flushed on close."""

        def __init__(self, path: Path, mode: CompressionMode) -> None:  # noqa: ARG002
            super().__init__(path, CompressionMode.NONE)
            if compressor is not None:
                self.compression, self.compressor = compression, compressor
            self.chunk_opened_ns: int | None = None

        def write(self, connection: Any, timestamp: int, data: bytes | memoryview) -> None:
            if self.chunk_opened_ns is None:
                self.chunk_opened_ns = timestamp
            super().write(connection, timestamp, data)
            if self.chunk.bio.tell() >= chunk_size:
                self.close_chunk()

        def close_chunk(self) -> None:
            super().close_chunk()
            self.bio.flush()
            self.chunk_opened_ns = None

    return ChunkedMcapWriter


class BagWriter:
    """Writes a new rosbag2 bag (MCAP storage) at ``path`` (a folder that must not exist).

    Args:
        path: the bag folder to create.
        compression: ``none``, ``zstd`` or ``lz4`` (MCAP chunk compression).
        chunk_size: bytes of messages per chunk, 1 KiB .. 1 MiB.
        chunk_duration: a chunk is also closed (by `maybe_close_chunk`) once its oldest
            message is this old [s]; 0 disables it.
    """

    def __init__(self, path: str | Path, compression: str = "none",
                 chunk_size: int = 256 * 1024, chunk_duration: float = 1.0) -> None:
        from rosbags.rosbag2 import Writer, WriterError
        from rosbags.rosbag2.enums import StoragePlugin

        if compression not in COMPRESSIONS:
            raise BagError(f"compression '{compression}' is not one of {list(COMPRESSIONS)}")
        if isinstance(chunk_size, bool) or not isinstance(chunk_size, (int, np.integer)) \
                or not MIN_CHUNK <= chunk_size <= MAX_CHUNK:
            raise BagError(f"chunk_size must be an integer number of bytes in {MIN_CHUNK}.."
                           f"{MAX_CHUNK}, got {chunk_size!r}")
        if not (math.isfinite(chunk_duration) and chunk_duration >= 0.0):
            raise BagError(f"chunk_duration must be >= 0 s, got {chunk_duration!r}")
        self.path = Path(path)
        self.chunk_duration_ns = int(chunk_duration * 1e9)
        self._writer = Writer(self.path, version=9, storage_plugin=StoragePlugin.MCAP)
        self._writer.STORAGE_PLUGINS = {StoragePlugin.MCAP: _chunk_storage(int(chunk_size),
                                                                           compression)}
        try:
            self._writer.open()
        except (WriterError, OSError) as exc:
            raise BagError(f"cannot create bag '{self.path}': {exc}") from None
        self._connections: dict[str, Any] = {}
        self.closed = False

    @property
    def mcap_path(self) -> Path:
        """The MCAP file inside the bag folder."""
        return self.path / f"{self.path.name}.mcap"

    def add_topic(self, topic: str, msgtype: str, qos: Sequence[Any] = (),
                  msgdef: str | None = None, digest: str | None = None) -> Any:
        """Register ``topic`` of ``msgtype`` with its offered QoS (``rosbags`` Qos list).

        ``msgdef``/``digest`` are needed for types the ``rosbags`` store does not know.
        """
        if topic in self._connections:
            return self._connections[topic]
        store = typestore()
        if msgdef is None and msgtype not in store.types:
            raise BagError(f"topic '{topic}': message type '{msgtype}' is unknown (not a "
                           "ROS 2 Jazzy standard type and no definition given)")
        kwargs = ({"msgdef": msgdef, "rihs01": digest} if msgdef is not None and digest
                  else {"typestore": store})
        conn = self._writer.add_connection(topic, msgtype, offered_qos_profiles=list(qos),
                                           **kwargs)
        self._connections[topic] = conn
        return conn

    def write(self, connection: Any, time_ns: int, data: bytes | memoryview) -> None:
        """Append one serialised message received at ``time_ns``."""
        self._writer.write(connection, int(time_ns), data)

    def maybe_close_chunk(self, now_ns: int) -> bool:
        """Close the open chunk if its oldest message is older than ``chunk_duration``."""
        storage = self._writer.storage
        opened = getattr(storage, "chunk_opened_ns", None)
        if (storage is None or opened is None or not self.chunk_duration_ns
                or now_ns - opened < self.chunk_duration_ns):
            return False
        storage.close_chunk()
        return True

    def set_custom_data(self, key: str, value: str) -> None:
        """A string stored in ``metadata.yaml`` (``custom_data``) at close."""
        self._writer.set_custom_data(key, value)

    def close(self) -> None:
        """Write the last chunk, the MCAP summary and ``metadata.yaml`` (idempotent)."""
        if not self.closed:
            self.closed = True
            self._writer.close()


# ---------------------------------------------------------------------------- reading
@dataclass
class TopicData:
    """One topic of a bag: type, offered QoS (``rosbags`` Qos), receive times [ns], bytes."""

    name: str
    msgtype: str
    qos: list[Any]
    times: np.ndarray
    raw: list[bytes]
    msgdef: str = ""
    digest: str = ""

    def __len__(self) -> int:
        return len(self.raw)


@dataclass
class Bag:
    """The selected topics of a bag, in memory."""

    path: Path
    topics: dict[str, TopicData]
    all_topics: dict[str, str]            # every topic of the bag -> type
    custom_data: dict[str, str] = field(default_factory=dict)
    recovered: str | None = None          # set when the bag was not closed by its writer

    def get(self, name: str) -> TopicData | None:
        """The topic ``name`` if it was read and holds messages."""
        t = self.topics.get(name)
        return t if t is not None and len(t) else None


def _locate(path: Path) -> tuple[Path, Path | None]:
    """(bag folder or file to open, the MCAP file when the bag needs recovery)."""
    if not path.exists():
        raise BagError(f"bag '{path}': no such file or folder")
    if path.is_dir():
        if (path / "metadata.yaml").is_file():
            return path, None
        files = sorted(path.glob("*.mcap"))
        if not files:
            raise BagError(f"bag '{path}': no metadata.yaml and no .mcap file in the folder "
                           "(expected a rosbag2 bag with MCAP storage)")
        return path, files[0]
    if path.suffix != ".mcap":
        raise BagError(f"bag '{path}': expected a rosbag2 folder or an .mcap file")
    with path.open("rb") as f:
        f.seek(0, 2)
        size = f.tell()
        f.seek(max(0, size - 8))
        tail = f.read(8)
    return path, (None if tail == b"\x89MCAP0\r\n" else path)


def read_bag(path: str | Path,
             topics: Iterable[str] | Callable[[str], bool] | None = None) -> Bag:
    """Read ``topics`` (names, a predicate on names, or None: all) of the bag at ``path``.

    A bag without ``metadata.yaml`` or an MCAP file without its footer is recovered up to
    its last complete chunk (see the module docstring). Raises `BagError` naming the bag.
    """
    p = Path(path)
    target, broken = _locate(p)
    wanted: Callable[[str], bool] | None
    if topics is None or callable(topics):
        wanted = topics
    else:
        names = set(topics)
        wanted = names.__contains__
    if broken is not None:
        return _recover(p, broken, wanted)
    from rosbags.rosbag2 import Reader
    try:
        with Reader(target) as reader:
            all_topics = {c.topic: c.msgtype for c in reader.connections}
            conns = [c for c in reader.connections if wanted is None or wanted(c.topic)]
            out: dict[str, TopicData] = {}
            for c in conns:
                if c.topic not in out:
                    qos = list(getattr(c.ext, "offered_qos_profiles", []) or [])
                    out[c.topic] = TopicData(c.topic, c.msgtype, qos, np.empty(0, np.int64), [],
                                             c.msgdef.data, c.digest)
            times: dict[str, list[int]] = {t: [] for t in out}
            fast = (_chunk_messages(_mcap_files(target), set(out))
                    if str(reader.compression_mode).lower() in ("", "none")
                    else None)
            if fast is not None:
                for name, (t_list, raw_list) in fast.items():
                    times[name], out[name].raw = t_list, raw_list
            else:
                for conn, t, raw in reader.messages(connections=conns):
                    times[conn.topic].append(t)
                    out[conn.topic].raw.append(bytes(raw))
            custom = dict(_custom_data(reader) or {})
    except BagError:
        raise
    except Exception as exc:  # rosbags ReaderError, YAML errors, struct errors, OSError
        raise BagError(f"bag '{p}': cannot read rosbag2: {exc}") from None
    for name, data in out.items():
        data.times = _sorted(data, times[name])
    return Bag(p, out, all_topics, custom)


_RECORD = struct.Struct("<BQ")             # MCAP record: opcode, content length
_MESSAGE = struct.Struct("<HIQQ")          # Message: channel id, sequence, log and publish time
_CHUNK = struct.Struct("<QQQI")            # Chunk: start and end time, size, CRC
_U32 = struct.Struct("<I")
_U64 = struct.Struct("<Q")
_MESSAGE_OP, _CHUNK_OP = 0x05, 0x06


def _mcap_files(target: Path) -> list[Path]:
    """The MCAP files of a bag folder (its metadata's file list; none when one is outside the
    folder) or the file itself."""
    if not target.is_dir():
        return [target]
    import yaml
    meta = yaml.safe_load((target / "metadata.yaml").read_text())
    info = meta.get("rosbag2_bagfile_information", {}) if isinstance(meta, dict) else {}
    files = [target / str(rel) for rel in info.get("relative_file_paths", [])]
    inside = target.resolve()
    # only files inside the bag folder (else rosbags' reader decides)
    return files if all(inside in f.resolve().parents for f in files) else []


def _decompressor(name: str) -> Callable[[bytes], bytes] | None:
    if name == "":
        return bytes
    if name == "zstd":
        try:
            from compression import zstd  # type: ignore[import-not-found]
        except ImportError:
            from backports import zstd  # type: ignore[no-redef]
        return zstd.decompress
    if name == "lz4":
        import lz4.frame
        return lz4.frame.decompress
    return None


def _chunk_messages(files: list[Path], topics: set[str]
                    ) -> dict[str, tuple[list[int], list[bytes]]] | None:
    """Receive times and bytes of the messages of ``topics``, read chunk by chunk from
    MCAP files with a summary (MCAP format: chunk index from the summary, then the Message
    records of each chunk in file order; the ``mcap`` package reads the summary). None when
    a file is not of that kind (no summary or chunk index, a compression other than none,
    zstd or lz4, messages outside the chunks): the caller reads it record by record."""
    from mcap.reader import make_reader
    if not files:
        return None
    out: dict[str, tuple[list[int], list[bytes]]] = {t: ([], []) for t in topics}
    for path in files:
        try:
            with path.open("rb") as f:
                summary = make_reader(f).get_summary()
                if summary is None or not summary.chunk_indexes or summary.statistics is None:
                    return None
                channels = {cid: out[ch.topic] for cid, ch in summary.channels.items()
                            if ch.topic in out}
                seen = 0
                for index in sorted(summary.chunk_indexes, key=lambda c: c.chunk_start_offset):
                    f.seek(index.chunk_start_offset)
                    record = f.read(index.chunk_length)
                    op, _ = _RECORD.unpack_from(record, 0)
                    if op != _CHUNK_OP:
                        return None
                    pos = 9 + _CHUNK.size
                    (n,) = _U32.unpack_from(record, pos)
                    decompress = _decompressor(record[pos + 4:pos + 4 + n].decode())
                    pos += 4 + n
                    (size,) = _U64.unpack_from(record, pos)
                    if decompress is None:
                        return None
                    data = decompress(record[pos + 8:pos + 8 + size])
                    seen += _messages_of(data, channels)
                if seen != summary.statistics.message_count:
                    return None
        except (OSError, struct.error, ValueError, KeyError):
            return None
    return out


def _messages_of(data: bytes, channels: dict[int, tuple[list[int], list[bytes]]]) -> int:
    """Append the Message records of chunk ``data`` to their channel's lists; the count of
    Message records (all channels)."""
    pos, end, count = 0, len(data), 0
    unpack_record, unpack_message = _RECORD.unpack_from, _MESSAGE.unpack_from
    head = 9 + _MESSAGE.size
    while pos < end:
        op, length = unpack_record(data, pos)
        if op == _MESSAGE_OP:
            count += 1
            cid, _, log_time, _ = unpack_message(data, pos + 9)
            target = channels.get(cid)
            if target is not None:
                target[0].append(log_time)
                target[1].append(data[pos + head:pos + 9 + length])
        pos += 9 + length
    return count


def _custom_data(reader: Any) -> dict[str, str] | None:
    storage = getattr(reader, "storage", None)
    meta = getattr(storage, "metadata", None)
    return getattr(meta, "custom", None) if meta is not None else None


def _sorted(data: TopicData, times: list[int]) -> np.ndarray:
    t = np.asarray(times, np.int64)
    if t.size > 1 and np.any(np.diff(t) < 0):
        order = np.argsort(t, kind="stable")
        data.raw = [data.raw[i] for i in order]
        t = t[order]
    return t


def _recover(path: Path, mcap_file: Path, wanted: Callable[[str], bool] | None) -> Bag:
    """Read an unclosed MCAP file record by record up to its last complete chunk."""
    from mcap.stream_reader import StreamReader
    from rosbags.rosbag2.metadata import parse_qos

    schemas: dict[int, Any] = {}
    channels: dict[int, Any] = {}
    out: dict[str, TopicData] = {}
    times: dict[str, list[int]] = {}
    error = ""
    try:
        with mcap_file.open("rb") as f:
            for record in StreamReader(f).records:
                kind = type(record).__name__
                if kind == "Schema":
                    schemas[record.id] = record
                elif kind == "Channel":
                    channels[record.id] = record
                elif kind == "Message":
                    ch = channels.get(record.channel_id)
                    if ch is None or (wanted is not None and not wanted(ch.topic)):
                        continue
                    if ch.topic not in out:
                        schema = schemas.get(ch.schema_id)
                        qos_text = ch.metadata.get("offered_qos_profiles", "")
                        try:
                            qos = parse_qos(qos_text) if qos_text else []
                        except Exception:  # a damaged QoS entry only loses the QoS
                            qos = []
                        out[ch.topic] = TopicData(ch.topic, schema.name if schema else "", qos,
                                                  np.empty(0, np.int64), [],
                                                  schema.data.decode() if schema else "")
                        times[ch.topic] = []
                    out[ch.topic].raw.append(bytes(record.data))
                    times[ch.topic].append(int(record.log_time))
    except Exception as exc:  # the truncated tail: EndOfFile, struct errors, bad lengths
        error = f"{type(exc).__name__}: {exc}" if str(exc) else type(exc).__name__
    if not channels and not out:
        raise BagError(f"bag '{path}': not closed by its recorder and no complete chunk could "
                       f"be read from '{mcap_file.name}' ({error or 'empty'})")
    for name, data in out.items():
        data.times = _sorted(data, times[name])
    all_topics = {ch.topic: (schemas[ch.schema_id].name if ch.schema_id in schemas else "")
                  for ch in channels.values()}
    count = sum(len(d) for d in out.values())
    note = (f"bag '{path}' was not closed by its recorder (no "
            f"{'metadata.yaml' if path.is_dir() else 'MCAP footer'}); read {count} messages "
            f"from the complete chunks; anything after the last complete chunk is lost")
    return Bag(path, out, all_topics, {}, note)


def repair_bag(src: str | Path, dst: str | Path, compression: str = "none") -> Bag:
    """Write every readable message of the bag ``src`` to a new, closed bag ``dst``."""
    bag = read_bag(src)
    writer = BagWriter(dst, compression=compression)
    try:
        events = []
        for data in bag.topics.values():
            conn = writer.add_topic(data.name, data.msgtype, data.qos,
                                    data.msgdef or None, data.digest or None)
            events.extend((int(t), i, conn, raw) for i, (t, raw) in
                          enumerate(zip(data.times, data.raw)))
        events.sort(key=lambda e: (e[0], e[1]))
        for t, _, conn, raw in events:
            writer.write(conn, t, raw)
        for key, value in bag.custom_data.items():
            writer.set_custom_data(key, value)
    finally:
        writer.close()
    return bag
