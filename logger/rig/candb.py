"""CAN signal layouts taken from a CAN database file (DBC and the other formats cantools reads).

A rig may name the team's database instead of repeating every bit position::

    [can]
    database = "larch.dbc"                  # relative to the rig file

    [[can.message]]
    name = "crank_teeth"
    database_message = "CRANK_TEETH"        # id, extended and length come from the database

      [[can.message.signal]]
      name = "tooth_period"
      database_signal = ["TOOTH_PERIOD_0", "TOOTH_PERIOD_1", "TOOTH_PERIOD_2"]   # an array
      role = "tooth_periods"
      saturated_raw = 0xFFFF

Before the rig is read, :func:`expand_can_database` replaces each ``database_message`` /
``database_signal`` by the keys the rig file would otherwise spell out (``id``, ``extended``,
``length``, ``rate_hz`` from the cycle time; ``start_bit``, ``length``, ``byte_order``,
``signed``, ``scale``, ``offset``, ``unit``, ``count``), so everything after it - the checks of
:mod:`logger.rig.validate` and the decoder - is the same as for a hand-written layout. What only
the rig knows stays in the rig: ``role``, ``saturated_raw``, ``modulo``. A key given both ways
must agree with the database (an id, a length); a bit position given both ways is refused.

The database's and the rig's bit conventions are the same (start bit = LSB for little-endian,
MSB in sawtooth numbering for big-endian), so the fields map one to one. Multiplexed messages and
signals, and floating-point signals, have no counterpart in the rig and are refused.
"""

from __future__ import annotations

from pathlib import Path
from typing import Any

from crankbeat.logger.rig.model import CanSignal
from crankbeat.logger.rig.schema import Problems
from crankbeat.logger.rig.validate import element_bits

__all__ = ["expand_can_database", "signal_fields"]

#: rig keys a database signal fills in (a rig signal naming a database signal may not set them)
LAYOUT_KEYS = ("start_bit", "length", "byte_order", "signed", "scale", "offset")


def expand_can_database(doc: dict[str, Any], *, base_dir: Path | None,
                        problems: Problems) -> None:
    """Fill the rig document's CAN layouts in from ``can.database``, in place.

    Parameters
    ----------
    doc : dict
        The parsed TOML of a rig file; untouched when ``can.database`` is absent.
    base_dir : Path or None
        Folder of the rig file (``database`` is relative to it); None for a shipped preset.
    problems : Problems
        Collects one line per problem (key path, what was found, what was expected).
    """
    can_sec = doc.get("can")
    if not isinstance(can_sec, dict) or "database" not in can_sec:
        return
    spec = can_sec.pop("database")
    before = len(problems)
    _expand(doc, can_sec, spec, base_dir, problems)
    if len(problems) > before:  # a broken link would only echo as missing keys further on
        problems.raise_if_any()


def _expand(doc: dict[str, Any], can_sec: dict[str, Any], spec: Any, base_dir: Path | None,
            problems: Problems) -> None:
    if not isinstance(spec, str):
        problems.add("can.database", f"got {spec!r}", "a file name (string)")
        return
    db = _load_database(spec, base_dir, problems)
    messages = can_sec.get("message")
    if db is None or not isinstance(messages, list):
        return
    for mi, msg in enumerate(messages):
        if isinstance(msg, dict) and "database_message" in msg:
            _expand_message(db, spec, msg, f"can.message[{mi}]", problems)


def _load_database(spec: str, base_dir: Path | None, problems: Problems):
    try:
        import cantools
    except ImportError:
        problems.add("can.database", f"{spec!r} needs the cantools package",
                     "pip install 'crankbeat[candb]', or bit layouts written in the rig")
        return None
    if base_dir is None:
        problems.add("can.database", f"{spec!r} in a rig that is not a file",
                     "a rig file on disk (the database path is relative to it)")
        return None
    path = base_dir / spec
    if not path.is_file():
        problems.add("can.database", f"no such file {str(path)!r}",
                     "a CAN database file (.dbc, .kcd, .sym, .arxml) relative to the rig file")
        return None
    try:
        return cantools.database.load_file(str(path), strict=False)
    except Exception as exc:  # cantools raises parser-specific errors; all mean "unreadable"
        first = (str(exc).strip().splitlines() or [type(exc).__name__])[0]
        problems.add("can.database", f"{str(path)!r} cannot be read ({first})",
                     "a CAN database cantools reads")
        return None


def _expand_message(db, spec: str, msg: dict[str, Any], path: str, problems: Problems) -> None:
    name = msg.pop("database_message")
    label = f"{path} ({msg.get('name', name)})"
    try:
        dbm = db.get_message_by_name(name)
    except KeyError:
        known = ", ".join(sorted(m.name for m in db.messages)[:8])
        problems.add(f"{label}.database_message", f"no message {name!r} in {spec}",
                     f"one of {known}")
        return
    if dbm.is_multiplexed():
        problems.add(f"{label}.database_message", f"message {name!r} is multiplexed",
                     "a message without multiplexing (its layout changes frame by frame)")
        return
    given = {"id": dbm.frame_id, "extended": dbm.is_extended_frame, "length": dbm.length}
    for key, value in given.items():
        if key in msg and msg[key] != value:
            shown = f"0x{value:X}" if key == "id" else repr(value)
            problems.add(f"{label}.{key}", f"{msg[key]!r} but {spec} says {shown} for "
                         f"{name!r}", f"{shown} (or leave {key} out)")
        msg.setdefault(key, value)
    if dbm.cycle_time and "rate_hz" not in msg:
        msg["rate_hz"] = 1000.0 / float(dbm.cycle_time)
    for si, sig in enumerate(msg.get("signal") or []):
        if isinstance(sig, dict) and "database_signal" in sig:
            _expand_signal(dbm, spec, sig, f"{path}.signal[{si}] ({sig.get('name', '?')})",
                           problems)


def signal_fields(sig) -> dict[str, Any]:
    """The rig keys of one cantools signal (layout and scaling; unit when it has one)."""
    out: dict[str, Any] = {
        "start_bit": int(sig.start), "length": int(sig.length),
        "byte_order": "little" if sig.byte_order == "little_endian" else "big",
        "signed": bool(sig.is_signed), "scale": float(sig.scale), "offset": float(sig.offset),
    }
    if sig.unit:
        out["unit"] = str(sig.unit)
    return out


def _expand_signal(dbm, spec: str, sig: dict[str, Any], label: str, problems: Problems) -> None:
    names = sig.pop("database_signal")
    if isinstance(names, str):
        names = [names]
    if not (isinstance(names, list) and names and all(isinstance(n, str) for n in names)):
        problems.add(f"{label}.database_signal", f"got {names!r}",
                     "a signal name, or a list of names for an array")
        return
    clash = [k for k in LAYOUT_KEYS + ("count",) if k in sig]
    if clash:
        problems.add(f"{label}.{clash[0]}", "given beside database_signal",
                     "the layout from the database only (leave it out)")
        return
    found = []
    for n in names:
        try:
            dbs = dbm.get_signal_by_name(n)
        except KeyError:
            known = ", ".join(s.name for s in dbm.signals[:8])
            problems.add(f"{label}.database_signal", f"no signal {n!r} in message "
                         f"{dbm.name!r} of {spec}", f"one of {known}")
            return
        if dbs.is_multiplexer or dbs.multiplexer_ids:
            problems.add(f"{label}.database_signal", f"signal {n!r} is multiplexed",
                         "a signal present in every frame")
            return
        if dbs.is_float:
            problems.add(f"{label}.database_signal", f"signal {n!r} is a float",
                         "an integer signal with scale and offset")
            return
        found.append(dbs)
    fields = [signal_fields(s) for s in found]
    for key, value in fields[0].items():
        if key != "unit" or "unit" not in sig:  # the rig may name the unit its own way
            sig[key] = value
    if len(found) > 1:
        sig["count"] = len(found)
        _check_array(fields, names, label, problems)


def _check_array(fields: list[dict[str, Any]], names: list[str], label: str,
                 problems: Problems) -> None:
    """The listed signals must be the consecutive elements of one array, as the rig lays it."""
    first = fields[0]
    for n, f in zip(names[1:], fields[1:]):
        for key in ("length", "byte_order", "signed", "scale", "offset"):
            if f[key] != first[key]:
                problems.add(f"{label}.database_signal", f"{n!r} has {key} {f[key]!r}, "
                             f"{names[0]!r} {first[key]!r}", "array elements alike but for "
                             "their position")
                return
    array = CanSignal(name="array", start_bit=first["start_bit"], length=first["length"],
                      byte_order=first["byte_order"], count=len(fields))
    for i, (n, f) in enumerate(zip(names, fields)):
        one = CanSignal(name=n, start_bit=f["start_bit"], length=f["length"],
                        byte_order=f["byte_order"])
        want = element_bits(array)[i]
        if element_bits(one)[0] != want:
            problems.add(f"{label}.database_signal", f"{n!r} starts at bit {f['start_bit']}",
                         f"element {i} right after the one before (MSB at bit {want[0]})")
            return
