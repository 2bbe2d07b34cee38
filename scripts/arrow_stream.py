"""A small writer of Apache Arrow IPC streams (the encapsulated stream format of the Arrow columnar format
specification: a Schema message, one RecordBatch message, the end-of-stream marker), for the acceptance hooks,
which must send the `exposures` part as `application/vnd.apache.arrow.stream` without a dependency.

    arrow_stream([("probability", "probability", [0.1, 0.2]), ("id", "id", ["a", None]), ("units", "units", [3, 1])])

Columns: "probability" as Float64, "id" as Utf8 (values written as text, None as null), "units" as Int64.
The message metadata are FlatBuffers tables (the format's Message.fbs and Schema.fbs), written front to
back: a table's vtable just before it, its children after it, every offset pointing forward.
"""

import struct

_V5 = 4  # MetadataVersion.V5
_SCHEMA, _RECORD_BATCH = 1, 3  # MessageHeader union
_INT, _FLOATING_POINT, _UTF8 = 2, 3, 5  # Type union
_DOUBLE = 2  # Precision.DOUBLE


class _Builder:
    def __init__(self):
        self.buf = bytearray(4)  # the root offset, set by finish

    def pad(self, align: int, extra: int = 0) -> None:
        """Zero bytes until position + extra is a multiple of align."""
        self.buf += bytes(-(len(self.buf) + extra) % align)

    def table(self, fields) -> int:
        """A table; fields: (slot, struct format or "off", value), an "off" value a function that writes the
        child and returns its position. Returns the table's position."""
        slots = max((f[0] for f in fields), default=-1) + 1
        layout, at = [], 4  # after the vtable offset
        for slot, fmt, value in sorted(fields, key=lambda f: -_size(f[1])):
            size = _size(fmt)
            at += -at % size
            layout.append((slot, fmt, value, at))
            at += size
        size = at + (-at % 4)
        entries = [0] * slots
        for slot, _, _, at in layout:
            entries[slot] = at
        self.pad(2)
        vtable = len(self.buf)
        self.buf += struct.pack(f"<HH{slots}H", 4 + 2 * slots, size, *entries)
        self.pad(8)
        table = len(self.buf)
        self.buf += bytes(size)
        struct.pack_into("<i", self.buf, table, table - vtable)
        children = []
        for slot, fmt, value, at in layout:
            if fmt == "off":
                children.append((table + at, value))
            else:
                struct.pack_into("<" + fmt, self.buf, table + at, value)
        for at, write in children:
            struct.pack_into("<I", self.buf, at, write() - at)
        return table

    def tables(self, writers) -> int:
        """A vector of tables."""
        self.pad(4)
        vector = len(self.buf)
        self.buf += struct.pack("<I", len(writers)) + bytes(4 * len(writers))
        for i, write in enumerate(writers):
            at = vector + 4 + 4 * i
            struct.pack_into("<I", self.buf, at, write() - at)
        return vector

    def structs(self, items) -> int:
        """A vector of structs of two longs (FieldNode, Buffer)."""
        self.pad(8, extra=4)
        vector = len(self.buf)
        self.buf += struct.pack("<I", len(items)) + b"".join(struct.pack("<qq", a, b) for a, b in items)
        return vector

    def string(self, text: str) -> int:
        data = text.encode()
        self.pad(4)
        at = len(self.buf)
        self.buf += struct.pack("<I", len(data)) + data + b"\0"
        return at

    def finish(self, root) -> bytes:
        struct.pack_into("<I", self.buf, 0, root())
        self.pad(8)
        return bytes(self.buf)


def _size(fmt: str) -> int:
    return 4 if fmt == "off" else struct.calcsize("<" + fmt)


def _message(header_type: int, header, body_length: int) -> bytes:
    b = _Builder()
    meta = b.finish(
        lambda: b.table([(0, "h", _V5), (1, "B", header_type), (2, "off", lambda: header(b)), (3, "q", body_length)])
    )
    # Encapsulated: the continuation marker, the metadata's length (padded to 8 bytes), the metadata.
    return struct.pack("<Ii", 0xFFFFFFFF, len(meta)) + meta


def _field(b: _Builder, name: str, kind: str) -> int:
    if kind == "probability":
        type_id, type_ = _FLOATING_POINT, lambda: b.table([(0, "h", _DOUBLE)])
    elif kind == "units":
        type_id, type_ = _INT, lambda: b.table([(0, "i", 64), (1, "B", 1)])
    else:
        type_id, type_ = _UTF8, lambda: b.table([])
    return b.table(
        [
            (0, "off", lambda: b.string(name)),
            (1, "B", 1),  # nullable
            (2, "B", type_id),
            (3, "off", type_),
            (5, "off", lambda: b.tables([])),  # no children
        ]
    )


def arrow_stream(columns) -> bytes:
    n = len(columns[0][2]) if columns else 0
    schema = _message(
        _SCHEMA,
        lambda b: b.table(
            [(0, "h", 0), (1, "off", lambda: b.tables([lambda c=c: _field(b, c[0], c[1]) for c in columns]))]
        ),
        0,
    )
    body, nodes, buffers = bytearray(), [], []

    def buffer(data: bytes) -> None:
        buffers.append((len(body), len(data)))
        body.extend(data + bytes(-len(data) % 8))

    for _, kind, values in columns:
        nulls = sum(v is None for v in values)
        nodes.append((n, nulls))
        if nulls:
            bits = bytearray((n + 7) // 8)
            for i, v in enumerate(values):
                if v is not None:
                    bits[i // 8] |= 1 << (i % 8)
            buffer(bytes(bits))
        else:
            buffer(b"")
        if kind == "probability":
            buffer(struct.pack(f"<{n}d", *[0.0 if v is None else v for v in values]))
        elif kind == "units":
            buffer(struct.pack(f"<{n}q", *[0 if v is None else v for v in values]))
        else:
            texts = [b"" if v is None else str(v).encode() for v in values]
            offsets, at = [0], 0
            for t in texts:
                at += len(t)
                offsets.append(at)
            buffer(struct.pack(f"<{n + 1}i", *offsets))
            buffer(b"".join(texts))
    batch = _message(
        _RECORD_BATCH,
        lambda b: b.table([(0, "q", n), (1, "off", lambda: b.structs(nodes)), (2, "off", lambda: b.structs(buffers))]),
        len(body),
    )
    return schema + batch + bytes(body) + struct.pack("<Ii", 0xFFFFFFFF, 0)
