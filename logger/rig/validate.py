"""Checks that span several keys of a rig: bit layouts, roles, ids, serial framing.

Each check adds one-line problems to the file's :class:`~logger.rig.schema.Problems`; nothing
here raises. The bit arithmetic is kept here (not borrowed from the decoder) so the rig check is
an independent second reading of the same DBC conventions.
"""

from __future__ import annotations

from crankbeat.logger.rig.model import CanMessage, CanSignal, SerialSensor
from crankbeat.logger.rig.schema import Problems

__all__ = ["element_bits", "occupied_bits", "check_messages", "check_sensor"]

#: roles that at most one signal of the whole rig may feed
RIG_UNIQUE_ROLES = ("tooth_periods", "cam_level", "engine_speed", "throttle", "gear", "coolant",
                    "road_speed")
FD_LENGTHS = (0, 1, 2, 3, 4, 5, 6, 7, 8, 12, 16, 20, 24, 32, 48, 64)


def element_bits(sig: CanSignal) -> list[list[int]]:
    """Frame bit numbers (``8 * byte + bit``, bit 0 = LSB of byte 0) of each element, MSB first.

    Little-endian: ``start_bit`` is the LSB and the element climbs. Big-endian (Motorola):
    ``start_bit`` is the MSB and the walk goes down a byte, then on to bit 7 of the next byte
    (sawtooth numbering). Array elements follow each other along that same walk.
    """
    total = sig.length * sig.count
    if sig.byte_order == "little":
        walk = list(range(sig.start_bit, sig.start_bit + total))
        return [walk[i * sig.length:(i + 1) * sig.length][::-1] for i in range(sig.count)]
    walk = [sig.start_bit]
    for _ in range(total - 1):
        b = walk[-1]
        walk.append(b + 15 if b % 8 == 0 else b - 1)
    return [walk[i * sig.length:(i + 1) * sig.length] for i in range(sig.count)]


def occupied_bits(sig: CanSignal) -> frozenset[int]:
    """Every frame bit number the signal (all its elements) occupies."""
    return frozenset(b for el in element_bits(sig) for b in el)


def _span(bits: frozenset[int] | set[int]) -> str:
    return f"bits {min(bits)}..{max(bits)}"


class _At:
    """Key paths of one named table: ``base.key (name)``, or ``base (name)`` for the table."""

    def __init__(self, base: str, name: str) -> None:
        self.base, self.name = base, name

    def __call__(self, key: str | None = None) -> str:
        return f"{self.base}{'.' + key if key else ''} ({self.name})"


def check_messages(msgs: list[tuple[int, CanMessage]], problems: Problems, *, fd: bool) -> None:
    """Ids, frame lengths, bit ranges, overlaps and role uniqueness of all CAN messages.

    ``msgs`` pairs each built message with its index in the file (for the key path).
    """
    seen_ids: dict[tuple[int, bool], int] = {}
    seen_names: dict[str, int] = {}
    role_at: dict[str, str] = {}
    for mi, msg in msgs:
        path = _At(f"can.message[{mi}]", msg.name)
        limit = 0x1FFFFFFF if msg.extended else 0x7FF
        if not 0 <= msg.can_id <= limit:
            problems.add(
                path("id"), f"0x{msg.can_id:X} does not fit in "
                f"{29 if msg.extended else 11} bits", f"0x0..0x{limit:X}"
                + ("" if msg.extended else " (or extended = true for a 29-bit id)"),
            )
        key = (msg.can_id, msg.extended)
        if key in seen_ids:
            problems.add(path("id"), f"0x{msg.can_id:X} is also the id of can.message"
                         f"[{seen_ids[key]}]", "each CAN id once")
        seen_ids.setdefault(key, mi)
        if msg.name in seen_names:
            problems.add(path("name"), f"{msg.name!r} is also the name of can.message"
                         f"[{seen_names[msg.name]}]", "unique message names")
        seen_names.setdefault(msg.name, mi)
        lengths = FD_LENGTHS if fd else tuple(range(9))
        if msg.length not in lengths:
            problems.add(path("length"), f"{msg.length} data bytes",
                         "one of " + ", ".join(map(str, lengths))
                         + ("" if fd else " (classic CAN; set can.fd = true for CAN FD)"))
            continue
        _check_signals(mi, msg, problems, role_at)


def _check_signals(mi: int, msg: CanMessage, problems: Problems, role_at: dict[str, str]) -> None:
    nbits = 8 * msg.length
    placed: list[tuple[CanSignal, frozenset[int]]] = []
    names: set[str] = set()
    counter: str | None = None
    for si, sig in enumerate(msg.signals):
        path = _At(f"can.message[{mi}].signal[{si}]", sig.name)
        if sig.name in names:
            problems.add(path("name"), f"{sig.name!r} is used twice in this message",
                         "unique signal names within a message")
        names.add(sig.name)
        elements = element_bits(sig)
        beyond = [i for i, el in enumerate(elements) if max(el) >= nbits]
        if beyond and sig.count > 1:
            problems.add(
                path(), f"element {beyond[0]} of {sig.count} "
                f"({_span(set(elements[beyond[0]]))}) lies beyond the {msg.length}-byte frame",
                f"count * length to fit in bits 0..{nbits - 1}",
            )
            continue
        if beyond:
            problems.add(path(), f"{_span(set(elements[0]))} lie beyond the "
                         f"{msg.length}-byte frame", f"all bits within 0..{nbits - 1}")
            continue
        bits = frozenset(b for el in elements for b in el)
        for other, obits in placed:
            shared = bits & obits
            if shared:
                problems.add(
                    path(), f"{_span(bits)} overlap signal {other.name!r} {_span(obits)} "
                    f"(shared {_span(shared)})", "signals on separate bits",
                )
        placed.append((sig, bits))
        if sig.role == "counter":
            if counter is not None:
                problems.add(path("role"), f"a second counter in this message (first: "
                             f"{counter!r})", "at most one counter per message")
            counter = counter or sig.name
        elif sig.role in role_at:
            problems.add(path("role"), f"role {sig.role!r} is already fed by "
                         f"{role_at[sig.role]}", "each of these roles at most once per rig: "
                         + ", ".join(RIG_UNIQUE_ROLES))
        elif sig.role is not None:
            role_at[sig.role] = f"{msg.name}.{sig.name}"


def check_sensor(idx: int, sensor: SerialSensor, problems: Problems) -> None:
    """Serial frame layout: fields, sync and checksum inside the frame and apart; roles."""
    path = _At(f"serial[{idx}]", sensor.name)
    n = sensor.frame_length
    used: list[tuple[str, range]] = []
    if len(sensor.sync) > n:
        problems.add(path("sync"), f"{len(sensor.sync)} sync bytes in a {n}-byte frame",
                     "sync shorter than frame_length")
    else:
        used.append(("the sync", range(0, len(sensor.sync))))
    cs = sensor.checksum
    if cs.kind != "none":
        range_ok = 0 <= cs.start < cs.end <= n
        if not range_ok:
            problems.add(path("checksum"), f"covers bytes {cs.start}..{cs.end - 1} "
                         f"(start = {cs.start}, end = {cs.end})",
                         f"0 <= start < end <= frame_length = {n}")
        stored = range(cs.at, cs.at + cs.size)
        if cs.at < 0 or cs.at + cs.size > n:
            problems.add(path("checksum.at"), f"the {cs.size}-byte checksum at offset {cs.at} "
                         f"runs past the {n}-byte frame", f"0 <= at <= {n - cs.size}")
        elif range_ok and cs.start < cs.at + cs.size and cs.at < cs.end:
            problems.add(path("checksum.at"), f"the stored checksum (bytes {stored.start}.."
                         f"{stored.stop - 1}) lies inside the bytes it covers",
                         "the checksum outside start..end")
        else:
            used.append(("the checksum", stored))
    roles: dict[str, str] = {}
    for fi, f in enumerate(sensor.fields):
        fpath = _At(f"serial[{idx}].field[{fi}]", f.name)
        span = range(f.offset, f.offset + f.size)
        if f.role is not None:
            if f.role in roles:
                problems.add(fpath("role"), f"role {f.role!r} is already fed by field "
                             f"{roles[f.role]!r}", "each role once per sensor")
            roles.setdefault(f.role, f.name)
        if span.stop > n:
            problems.add(fpath(), f"bytes {span.start}..{span.stop - 1} run past the {n}-byte "
                         "frame", f"offset <= {n - f.size} for {f.dtype}")
            continue
        for what, other in used:
            if span.start < other.stop and other.start < span.stop:
                problems.add(fpath(), f"bytes {span.start}..{span.stop - 1} overlap {what} "
                             f"(bytes {other.start}..{other.stop - 1})", "fields on free bytes")
        used.append((f"field {f.name!r}", span))
    missing = [r for r in ("accel_x", "accel_y", "accel_z") if r not in roles]
    if missing:
        problems.add(path("field"), f"no field with role {', '.join(missing)}",
                     "one field each for accel_x, accel_y and accel_z")
    for role, attr in (("sequence", "sequence_modulo"), ("device_time", "device_time_modulo")):
        f = sensor.field_for(role)
        mod = getattr(sensor, attr)
        if f is not None and mod > 2 ** (8 * f.size):
            problems.add(path(attr), f"{mod} exceeds what the {f.dtype} field "
                         f"{f.name!r} can hold", f"at most {2 ** (8 * f.size)}")
