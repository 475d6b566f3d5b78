"""Which study file a verb works on, when the user names none."""

from __future__ import annotations

from pathlib import Path
from typing import Callable

import yaml

from estbench.core import bundled
from estbench.core.errors import UserError

#: The study file a project made by ``estbench init`` has.
DEFAULT_NAME = "study.yaml"


def _is_study(path: Path) -> bool:
    """A YAML file whose top level is a mapping with a ``study`` key."""
    try:
        data = yaml.safe_load(path.read_text())
    except (OSError, UnicodeDecodeError, yaml.YAMLError):
        return False
    return isinstance(data, dict) and "study" in data


def locate_study(given: Path | None, demo: bool, folder: Path | None = None,
                 say: Callable[[str], None] = print) -> Path:
    """The study file: *given*; the bundled demo if *demo*; else ``./study.yaml``,
    else the one study file (``*.yaml``/``*.yml`` with a ``study`` key) in *folder*.

    Says which file it chose when the user did not name one; ``UserError`` when
    there is none or more than one to choose from.
    """
    if given is not None and demo:
        raise UserError("`--demo`: give either a study file or --demo, not both")
    if demo:
        say(f"estbench: using the bundled demo study {bundled.DEMO_STUDY}")
        return bundled.DEMO_STUDY
    if given is not None:
        return given
    folder = Path.cwd() if folder is None else folder
    default = folder / DEFAULT_NAME
    if default.is_file():
        found = [default]
    else:
        found = [p for p in sorted([*folder.glob("*.yaml"), *folder.glob("*.yml")]) if _is_study(p)]
    if len(found) > 1:
        raise UserError(f"`STUDY`: no study file given and {len(found)} here "
                        f"({', '.join(p.name for p in found)}); name the one to use")
    if not found:
        raise UserError(f"`STUDY`: no study file given and none in {folder} (looked for {DEFAULT_NAME} "
                        f"or one *.yaml with a `study:` key); name one, create a project with "
                        f"`estbench init`, or try the demo with `--demo`")
    say(f"estbench: using the study file {found[0].relative_to(folder)}")
    return found[0]
