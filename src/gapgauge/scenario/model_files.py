"""The model file and every file MuJoCo reads with it: where it is, that it looks like MJCF, and the
digest of their bytes (part of the sweep's identity).

A scenario's model may be anywhere on disk: an absolute path, or a path relative to the scenario file
that names it. Includes and assets resolve as MuJoCo resolves them: an ``<include file>`` relative to the
main model file's folder, mesh, height-field and skin files relative to ``<compiler meshdir>`` (else
``assetdir``, else the model's folder), textures relative to ``texturedir`` (else ``assetdir``).
"""

from __future__ import annotations

import hashlib
from pathlib import Path
from xml.etree import ElementTree

from ..errors import ScenarioError

MAX_MODEL_BYTES = 20_000_000
#: a model file with more includes than this is refused (an include cycle, or not a robot description)
MAX_MODEL_FILES = 2_000
_MESH_LIKE = ("mesh", "hfield", "skin", "model")
_TEXTURE_FILES = ("file", "fileright", "fileleft", "fileup", "filedown", "filefront", "fileback")


def resolve_model(origin: Path, key: str, value: str) -> Path:
    """The model file named ``value`` in the scenario file ``origin`` (absolute, or relative to it)."""
    if not value.strip():
        raise ScenarioError(f"{origin}: key '{key}': is empty; name the MJCF file")
    target = Path(value).expanduser()
    target = (target if target.is_absolute() else origin.parent / target).resolve()
    if target.suffix.lower() not in (".xml", ".mjcf"):
        raise ScenarioError(f"{origin}: key '{key}': {value!r} is not an .xml file; name the MJCF (.xml) file")
    if not target.is_file():
        raise ScenarioError(f"{origin}: key '{key}': file {value!r} not found (looked at {target}); check the path")
    return target


def check_mjcf(model_path: Path, scenario_path: Path, key: str = "model") -> ElementTree.ElementTree:
    """Refuse a model file that is too large, not UTF-8, not MJCF or not well-formed XML; return its tree."""
    size = model_path.stat().st_size
    if size > MAX_MODEL_BYTES:
        raise ScenarioError(f"{scenario_path}: key '{key}': {model_path} is {size} bytes, more than "
                            f"{MAX_MODEL_BYTES}; name the MJCF of the robot (meshes go in their own files)")
    head = model_path.read_bytes()[:4096]
    try:
        text = head.decode("utf-8")
    except UnicodeDecodeError:
        raise ScenarioError(f"{scenario_path}: key '{key}': {model_path} is not UTF-8 text; "
                            "name an MJCF (.xml) file") from None
    if "<mujoco" not in text:
        raise ScenarioError(f"{scenario_path}: key '{key}': {model_path} has no <mujoco> element near its start; "
                            "name an MJCF file")
    try:
        return ElementTree.parse(model_path)
    except ElementTree.ParseError as exc:
        raise ScenarioError(f"{scenario_path}: key '{key}': {model_path} is not well-formed XML ({exc}); "
                            "fix the MJCF file") from None


def model_files(model_path: Path) -> list[Path]:
    """The main model file, then every include and asset file it names (found on disk), each once.

    Files MuJoCo cannot find are left out: compiling the model then names them.
    """
    root_dir = model_path.parent
    found: dict[Path, None] = {model_path.resolve(): None}
    queue = [model_path]
    dirs = {"mesh": root_dir, "texture": root_dir}
    while queue and len(found) <= MAX_MODEL_FILES:
        path = queue.pop(0)
        try:
            tree = ElementTree.parse(path)
        except (ElementTree.ParseError, OSError):
            continue  # MuJoCo's compiler reports it
        for element in tree.iter("compiler"):
            asset = element.get("assetdir")
            if asset is not None:
                dirs["mesh"] = dirs["texture"] = root_dir / asset
            if element.get("meshdir") is not None:
                dirs["mesh"] = root_dir / element.get("meshdir")
            if element.get("texturedir") is not None:
                dirs["texture"] = root_dir / element.get("texturedir")
        for element in tree.iter():
            tag = element.tag
            names: list[tuple[str, Path]] = []
            if tag == "include" and element.get("file"):
                names.append((element.get("file"), root_dir))
            elif tag in _MESH_LIKE and element.get("file"):
                names.append((element.get("file"), dirs["mesh"]))
            elif tag == "texture":
                names += [(element.get(a), dirs["texture"]) for a in _TEXTURE_FILES if element.get(a)]
            for name, base in names:
                target = Path(name) if Path(name).is_absolute() else base / name
                if not target.is_file():
                    continue
                target = target.resolve()
                if target not in found:
                    found[target] = None
                    if tag == "include" or target.suffix.lower() == ".xml":
                        queue.append(target)
    return list(found)


def files_digest(files: list[Path]) -> str:
    """sha256 over each file's name and bytes, in order (the model part of the simulation hash)."""
    digest = hashlib.sha256()
    for path in files:
        digest.update(path.name.encode() + b"\0" + hashlib.sha256(path.read_bytes()).digest())
    return digest.hexdigest()


def files_stamp(files: list[Path]) -> tuple[tuple[str, int, int], ...]:
    """(path, size, modification time) of each file: the compiled-model cache key."""
    out = []
    for path in files:
        stat = path.stat()
        out.append((str(path), stat.st_size, stat.st_mtime_ns))
    return tuple(out)
