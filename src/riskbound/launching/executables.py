"""Command lines of launch-file nodes: `<node pkg exec>` → the program to run.

For this package, exec X is the module riskbound.ros.X run by the current Python (`python -m`):
it works in a virtual environment with an editable install, where no console script needs to
be on PATH, and it names the same code the installed console script X runs. For any package
(this one included, when its module is missing) the standard install location lib/PKG/X under
each AMENT_PREFIX_PATH entry is searched, then PATH.
"""

import importlib.util
import os
import shutil
import sys
from pathlib import Path

from riskbound.launching.xml_description import PACKAGE, LaunchFileError


def _module_exists(name):
    try:
        return importlib.util.find_spec(name) is not None
    except (ImportError, ValueError):
        return False


def program(package, executable):
    """argv prefix that runs `executable` of `package`; LaunchFileError saying where it looked."""
    if package == PACKAGE and executable.isidentifier() and _module_exists(f"{PACKAGE}.ros.{executable}"):
        return [sys.executable, "-m", f"{PACKAGE}.ros.{executable}"]
    prefixes = [p for p in os.environ.get("AMENT_PREFIX_PATH", "").split(os.pathsep) if p]
    for prefix in prefixes:
        candidate = Path(prefix) / "lib" / package / executable
        if candidate.is_file() and os.access(candidate, os.X_OK):
            return [str(candidate)]
    on_path = shutil.which(executable)
    if on_path:
        return [on_path]
    looked = ([f"module {PACKAGE}.ros.{executable}"] if package == PACKAGE else []) + [
        f"lib/{package}/{executable} under AMENT_PREFIX_PATH ({os.pathsep.join(prefixes) or 'not set'})", "PATH"]
    raise LaunchFileError(f"<node pkg='{package}' exec='{executable}'>: executable not found; looked for "
                          + ", ".join(looked))


def node_command(node):
    """Full argv of a NodeAction."""
    return program(node.package, node.executable) + node.arguments + node.ros_arguments()
