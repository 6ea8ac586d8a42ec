"""Fast decoders for the few message layouts a review reads by the thousand.

A ten-minute bag holds tens of thousands of poses, odometry messages and statuses; decoding each
into message objects costs most of the review's time. These functions read the CDR bytes
(little-endian, XCDR1 as rosbag2 stores them) straight into numpy arrays and plain Python values.
Alignment in CDR is counted from the end of the 4-byte encapsulation header: a primitive of size n
starts at a multiple of n, strings are a uint32 length (with the terminating NUL) then the bytes.

Each decoder raises CdrLayoutError when the bytes do not have the expected layout; the caller
then decodes the message with the type store, which either succeeds (an unusual but valid
message) or names the damage.
"""

import struct

import numpy as np

_LITTLE_ENDIAN_CDR = (b"\x00\x01", b"\x00\x03")  # plain CDR and parameter-list CDR, little-endian
_U32 = struct.Struct("<I")
_STAMP = struct.Struct("<iI")


class CdrLayoutError(ValueError):
    """The bytes are not the expected little-endian layout (or are truncated)."""


class _Cursor:
    """Reads primitives at absolute offsets into `raw`; alignment counts from offset 4."""

    __slots__ = ("raw", "pos")

    def __init__(self, raw):
        if len(raw) < 4 or bytes(raw[0:2]) not in _LITTLE_ENDIAN_CDR:
            raise CdrLayoutError("not little-endian CDR")
        self.raw = bytes(raw)
        self.pos = 4

    def align(self, size):
        self.pos = ((self.pos - 4 + size - 1) & ~(size - 1)) + 4

    def u8(self):
        if self.pos >= len(self.raw):
            raise CdrLayoutError("truncated")
        value = self.raw[self.pos]
        self.pos += 1
        return value

    def u32(self):
        pos = ((self.pos - 1) & ~3) + 4  # aligned to 4 counting from offset 4
        try:
            (value,) = _U32.unpack_from(self.raw, pos)
        except struct.error:
            raise CdrLayoutError("truncated") from None
        self.pos = pos + 4
        return value

    def stamp_s(self):
        pos = ((self.pos - 1) & ~3) + 4
        try:
            sec, nanosec = _STAMP.unpack_from(self.raw, pos)
        except struct.error:
            raise CdrLayoutError("truncated") from None
        self.pos = pos + 8
        return sec + 1e-9 * nanosec

    def string(self):
        pos = ((self.pos - 1) & ~3) + 4
        try:
            (length,) = _U32.unpack_from(self.raw, pos)
        except struct.error:
            raise CdrLayoutError("truncated") from None
        start = pos + 4
        end = start + length
        if length == 0 or end > len(self.raw):
            raise CdrLayoutError("bad string length")
        try:
            text = self.raw[start:end - 1].decode("utf-8")
        except UnicodeDecodeError:
            raise CdrLayoutError("string is not UTF-8") from None
        self.pos = end
        return text

    def float64s(self, count):
        self.align(8)
        end = self.pos + 8 * count
        if end > len(self.raw):
            raise CdrLayoutError("truncated")
        values = np.frombuffer(self.raw, dtype="<f8", count=count, offset=self.pos)
        self.pos = end
        return values

    def header(self):
        stamp = self.stamp_s()
        return stamp, self.string()


def header(raw):
    """(stamp_s, frame_id) of any message that starts with a std_msgs/Header."""
    return _Cursor(raw).header()


def pose_array(raw):
    """geometry_msgs/PoseArray → (stamp_s, frame_id, poses (n, 7): x, y, z, qx, qy, qz, qw)."""
    cursor = _Cursor(raw)
    stamp, frame_id = cursor.header()
    count = cursor.u32()
    return stamp, frame_id, cursor.float64s(7 * count).reshape(count, 7)


def odometry(raw):
    """nav_msgs/Odometry → (stamp_s, frame_id, child_frame_id, values (85,)): pose x, y, z, qx, qy,
    qz, qw; pose covariance (36); twist linear x, y, z, angular x, y, z; twist covariance (36)."""
    cursor = _Cursor(raw)
    stamp, frame_id = cursor.header()
    child = cursor.string()
    return stamp, frame_id, child, cursor.float64s(85)


def twist_stamped(raw):
    """geometry_msgs/TwistStamped → (stamp_s, frame_id, values (6,): linear xyz, angular xyz)."""
    cursor = _Cursor(raw)
    stamp, frame_id = cursor.header()
    return stamp, frame_id, cursor.float64s(6)


def pose_stamped(raw):
    """geometry_msgs/PoseStamped → (stamp_s, frame_id, values (7,): x, y, z, qx, qy, qz, qw)."""
    cursor = _Cursor(raw)
    stamp, frame_id = cursor.header()
    return stamp, frame_id, cursor.float64s(7)


def path(raw):
    """nav_msgs/Path → (stamp_s, frame_id, pose stamps (n,), poses (n, 7))."""
    cursor = _Cursor(raw)
    stamp, frame_id = cursor.header()
    count = cursor.u32()
    stamps = np.empty(count)
    poses = np.empty((count, 7))
    for i in range(count):
        stamps[i], _ = cursor.header()
        poses[i] = cursor.float64s(7)
    return stamp, frame_id, stamps, poses


def _strings(cursor, count):
    """`count` consecutive CDR strings; the hot loop of status decoding, kept to plain locals."""
    raw, pos, unpack = cursor.raw, cursor.pos, _U32.unpack_from
    out = []
    try:
        for _ in range(count):
            pos = ((pos - 1) & ~3) + 4
            (length,) = unpack(raw, pos)
            if length == 0:
                raise CdrLayoutError("bad string length")
            start = pos + 4
            pos = start + length
            out.append(raw[start:pos - 1])
    except struct.error:
        raise CdrLayoutError("truncated") from None
    if pos > len(raw):
        raise CdrLayoutError("truncated")
    cursor.pos = pos
    try:
        return [item.decode("utf-8") for item in out]
    except UnicodeDecodeError:
        raise CdrLayoutError("string is not UTF-8") from None


def _status(cursor):
    level = cursor.u8()
    name, message, hardware_id = _strings(cursor, 3)
    pairs = _strings(cursor, 2 * cursor.u32())
    return level, name, message, hardware_id, dict(zip(pairs[0::2], pairs[1::2]))


def diagnostic_status(raw):
    """diagnostic_msgs/DiagnosticStatus → (level, name, message, hardware_id, {key: value})."""
    return _status(_Cursor(raw))


def diagnostic_array(raw):
    """diagnostic_msgs/DiagnosticArray → (stamp_s, [(level, name, message, hardware_id, {key: value})])."""
    cursor = _Cursor(raw)
    stamp, _ = cursor.header()
    return stamp, [_status(cursor) for _ in range(cursor.u32())]


def uint32_multi_array(raw):
    """std_msgs/UInt32MultiArray → data (n,) uint32 (the layout is skipped)."""
    cursor = _Cursor(raw)
    for _ in range(cursor.u32()):
        cursor.string()
        cursor.u32()
        cursor.u32()
    cursor.u32()  # data_offset
    count = cursor.u32()
    if cursor.pos + 4 * count > len(cursor.raw):
        raise CdrLayoutError("truncated")
    return np.frombuffer(cursor.raw, dtype="<u4", count=count, offset=cursor.pos).copy()


def point_cloud(raw):
    """sensor_msgs/PointCloud2 → (stamp_s, frame_id, fields [(name, offset, datatype, count)],
    is_bigendian, point_step, point count, data bytes)."""
    cursor = _Cursor(raw)
    stamp, frame_id = cursor.header()
    height, width = cursor.u32(), cursor.u32()
    fields = []
    for _ in range(cursor.u32()):
        name = cursor.string()
        offset = cursor.u32()
        datatype = cursor.u8()
        fields.append((name, offset, datatype, cursor.u32()))
    is_bigendian = bool(cursor.u8())
    point_step = cursor.u32()
    cursor.u32()  # row_step
    size = cursor.u32()
    if cursor.pos + size > len(cursor.raw):
        raise CdrLayoutError("truncated")
    data = cursor.raw[cursor.pos:cursor.pos + size]
    return stamp, frame_id, fields, is_bigendian, point_step, height * width, data
