"""The scenario's ``model`` key and ``[model.channels]`` map: which file, and which of its joints, bodies,
sites, geoms and sensors the trade's channels come from.

Two forms::

    model = "../models/planar_body.xml"      # a plain path: the bundled planar body's map (PLANAR_BODY)

    [model]
    file = "/home/lab/robot/robot.xml"       # absolute, or relative to the scenario file; anywhere on disk

    [model.channels]
    joints = ["left_ankle", "right_ankle"]   # actuated joints (model names), or {trade_name = "model_joint"},
                                             # or {trade_name = {joint = "...", actuator = "..."}}
    contacts = { heel = ["lf_heel", "rf_heel"], toe = ["lf_toe", "rf_toe"] }   # sites, geoms or touch sensors
    rear = "heel"                            # contact group at the rear edge of the base of support
    front = "toe"                            # ... and at the front edge (margin of stability)
    com_body = "pelvis"                      # subtree centre of mass = whole-body centre of mass
    trunk = "torso"                          # trunk pitch
    support = "floor"                        # geom whose top is the support surface (com_z reference)
    fall_contacts = ["torso", "left_thigh"]  # sites, touch sensors or bodies: their contact is a fall
    platform = ""                            # body of a translating platform (platform tasks name it)
    lateral = true                           # 3-D (medio-lateral channels); default: from the model

This module only reads and validates the table; :mod:`gapgauge.scenario.model_info` checks the names
against the compiled model.
"""

from __future__ import annotations

from ..trajectory import BODY_CHANNELS, contact_channels, joint_channels
from .reader import TableReader, short_repr
from .types import PLANAR_BODY, BodyMap, ContactGroup, JointMap

#: trade names must be usable as channel-name stems
_NAME_CHARS = set("abcdefghijklmnopqrstuvwxyz0123456789_")
_MAX_JOINTS = 64
_MAX_POINTS = 64


def read_model(top: TableReader) -> tuple[str, BodyMap | None]:
    """The model file as written (the loader resolves it) and its channel map (None when the scenario
    names the model as a plain path: the caller's default map applies)."""
    if not top.has("model"):
        top.get("model", str, fix='name the MJCF file, e.g. model = "../models/planar_body.xml"')
    value = top.table.get("model")
    if isinstance(value, str):
        top.get("model", str)
        return value, None
    if not isinstance(value, dict):
        top.get("model", (str, dict))  # raises with the type
    r = top.table_at("model", default_empty=False)
    file = r.get("file", str, fix='name the MJCF file, e.g. file = "../models/planar_body.xml"')
    channels = r.table_at("channels") if r.has("channels") else None
    body = read_channels(channels) if channels is not None else None
    r.finish()
    return file, body


def _stem(r: TableReader, key: str, name: str) -> str:
    if not name or not set(name) <= _NAME_CHARS or name[0].isdigit():
        raise r.fail(key, f"{name!r} cannot name a channel", "use lower-case letters, digits and _ (e.g. left_ankle)")
    return name


def _names(r: TableReader, key: str, default: tuple[str, ...] | None = None) -> tuple[str, ...]:
    """A string or a list of strings."""
    value = r.get(key, (str, list), default if default is not None else ...)
    items = [value] if isinstance(value, str) else list(value)
    if not all(isinstance(v, str) and v for v in items):
        raise r.fail(key, f"must be a name or a list of names, got {short_repr(value)}", 'e.g. ["heel_site"]')
    if len(items) > _MAX_POINTS:
        raise r.fail(key, f"names {len(items)} items", f"name at most {_MAX_POINTS}")
    return tuple(items)


def read_channels(r: TableReader) -> BodyMap:
    """Validate a ``[model.channels]`` table (see the module docstring)."""
    raw = r.get("joints", (list, dict), fix='list the actuated joints, e.g. joints = ["ankle", "knee", "hip"]')
    joints: list[JointMap] = []
    if isinstance(raw, list):
        if not all(isinstance(v, str) for v in raw):
            raise r.fail("joints", f"must list joint names, got {short_repr(raw)}", 'e.g. joints = ["ankle", "hip"]')
        joints = [JointMap(_stem(r, "joints", v), v, "") for v in raw]
    else:
        jr = r.table_at("joints")
        for name in list(jr.table):
            value = jr.table[name]
            if isinstance(value, str):
                jr.get(name, str)
                joints.append(JointMap(_stem(jr, name, name), value, ""))
            else:
                j = jr.table_at(name, default_empty=False)
                joints.append(JointMap(_stem(jr, name, name), j.get("joint", str, name), j.get("actuator", str, "")))
                j.finish()
        jr.finish()
    if not 1 <= len(joints) <= _MAX_JOINTS:
        raise r.fail("joints", f"names {len(joints)} joints", f"name between 1 and {_MAX_JOINTS} actuated joints")
    if len({j.name for j in joints}) < len(joints) or len({j.joint for j in joints}) < len(joints):
        raise r.fail("joints", "names a joint twice", "name each actuated joint once")

    cr = r.table_at("contacts", default_empty=False)
    contacts = [ContactGroup(_stem(cr, name, name), _names(cr, name)) for name in list(cr.table)]
    cr.finish()
    if not contacts:
        raise cr.fail("", "is empty", 'name the points under the feet, e.g. contacts = { heel = "heel_site" }')
    groups = [c.name for c in contacts]
    rear = r.get("rear", str, groups[0])
    front = r.get("front", str, groups[-1])
    for key, value in (("rear", rear), ("front", front)):
        if value not in groups:
            raise r.fail(key, f"{value!r} is not a contact group", f"use one of {', '.join(groups)}")
    lateral = r.get("lateral", bool, None)
    body = BodyMap(
        joints=tuple(joints), contacts=tuple(contacts), rear=rear, front=front,
        com_body=r.get("com_body", str, ""), trunk=r.get("trunk", str, fix='name the trunk body, e.g. trunk = "torso"'),
        support=r.get("support", str, ""), fall_contacts=_names(r, "fall_contacts", ()),
        platform=r.get("platform", str, ""), lateral=lateral,
    )
    clash = sorted(set(body.joint_names) & set(groups))
    if clash:
        raise r.fail("contacts", f"{clash[0]!r} names both a joint and a contact group", "give them distinct names")
    for key, names, channels in (("joints", body.joint_names, joint_channels),
                                 ("contacts", groups, lambda g: contact_channels(g, True))):
        for name in names:
            taken = [ch for ch in channels(name) if ch in BODY_CHANNELS]
            if taken:
                raise r.fail(key, f"{name!r} would make channel {taken[0]!r}, a body channel", "rename it")
    r.finish()
    return body


def default_body() -> BodyMap:
    """The map of a scenario that names its model as a plain path: the bundled planar body's."""
    return PLANAR_BODY


def scenario_channels(body: BodyMap, lateral: bool, platform: bool) -> dict[str, tuple[str, str]]:
    """Every trajectory channel of a scenario: name -> (dimension, meaning), in a fixed order (joints,
    contact groups, body channels); the medio-lateral ones only on a 3-D model, ``platform_x`` only when
    the model has a platform."""
    out: dict[str, tuple[str, str]] = {}
    for j in body.joints:
        out.update(joint_channels(j.name))
    for c in body.contacts:
        out.update(contact_channels(c.name, lateral))
    for name, spec in BODY_CHANNELS.items():
        if name.endswith("_y") or name == "com_vy":
            if lateral:
                out[name] = spec
        elif name != "platform_x" or platform:
            out[name] = spec
    return out

