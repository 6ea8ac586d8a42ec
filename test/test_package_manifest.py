"""package.xml declares what the code imports, by rosdep key, and nothing it does not.

The imports are read from the source (every `import` statement, also those inside functions); an
import belongs to a ROS package when the installed distribution providing it is a ROS wheel
(named ros-*), and then its rosdep key is the package name. Plain Python libraries map to the
keys below.
"""

import ast
import importlib.metadata
import sys
import xml.etree.ElementTree as ET
from pathlib import Path

import yaml

REPO = Path(__file__).resolve().parents[1]
# The package and the tests' own helper modules.
OUR_MODULES = {"riskbound"} | {path.stem for path in (REPO / "test").glob("*.py")}

# rosdep keys of the Python libraries, from ros/rosdistro rosdep/python.yaml (casadi-pip,
# python3-filterpy-pip checked there; python3-numpy, python3-scipy, python3-matplotlib,
# python3-yaml, python3-pytest, python3-transforms3d, python3-rosbags-pip, python3-psutil: value
# from memory). The public database has no key for distributed (checked there): ours is defined in
# rosdep/riskbound.yaml.
PYTHON_KEYS = {
    "numpy": "python3-numpy",
    "scipy": "python3-scipy",
    "matplotlib": "python3-matplotlib",
    "yaml": "python3-yaml",
    "casadi": "casadi-pip",
    "filterpy": "python3-filterpy-pip",
    "transforms3d": "python3-transforms3d",
    "rosbags": "python3-rosbags-pip",
    "pytest": "python3-pytest",
    "psutil": "python3-psutil",
    "distributed": "python3-distributed-pip",
}
OWN_KEYS_FILE = REPO / "rosdep" / "riskbound.yaml"


def imported_modules(folder):
    """Top-level names of the third-party modules imported anywhere under `folder`."""
    names = set()
    for path in folder.rglob("*.py"):
        for node in ast.walk(ast.parse(path.read_text(), filename=str(path))):
            if isinstance(node, ast.Import):
                names |= {alias.name.split(".")[0] for alias in node.names}
            elif isinstance(node, ast.ImportFrom) and node.level == 0:
                names.add(node.module.split(".")[0])
    return names - set(sys.stdlib_module_names) - OUR_MODULES


def rosdep_key(module):
    distributions = importlib.metadata.packages_distributions().get(module, [])
    if any(name.startswith("ros-") for name in distributions):
        return module
    assert module in PYTHON_KEYS, (f"{module!r} (distribution {distributions}) has no rosdep key here: add it to "
                                   "PYTHON_KEYS and to package.xml")
    return PYTHON_KEYS[module]


def declared(*tags):
    root = ET.parse(REPO / "package.xml").getroot()
    return {element.text.strip() for tag in tags for element in root.iter(tag)}


def test_every_runtime_import_is_a_declared_dependency_and_every_declared_one_is_imported():
    needed = {rosdep_key(module) for module in imported_modules(REPO / "src")}
    runtime = declared("exec_depend", "depend")
    assert sorted(needed - runtime) == [], "imported by src/ but missing from package.xml"
    assert sorted(runtime - needed) == [], "declared in package.xml but imported by nothing in src/"


def test_every_test_import_is_declared_for_tests_or_at_run_time():
    needed = {rosdep_key(module) for module in imported_modules(REPO / "test")}
    assert sorted(needed - declared("exec_depend", "depend", "test_depend")) == []


def test_the_manifest_check_sees_an_import_inside_a_function(tmp_path):
    (tmp_path / "late.py").write_text("def f():\n    from scipy import stats\n    import numpy.linalg\n")
    assert imported_modules(tmp_path) == {"scipy", "numpy"}


def test_keys_missing_from_the_public_database_are_defined_in_our_rosdep_file():
    own = yaml.safe_load(OWN_KEYS_FILE.read_text())
    assert set(own) == {"python3-distributed-pip"}
    assert set(own) <= declared("exec_depend", "depend", "test_depend")
    for key, rules in own.items():
        assert rules["ubuntu"]["pip"]["packages"], key
