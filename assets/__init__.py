"""Presets, style sheets and images shipped with Quietlayer."""

from importlib.resources import files


def preset_path(name: str):
    """Path-like handle of a preset scenario shipped in assets/presets."""
    return files(__name__) / "presets" / f"{name}.toml"


def preset_names() -> list[str]:
    return sorted(p.name[:-5] for p in (files(__name__) / "presets").iterdir() if p.name.endswith(".toml"))
