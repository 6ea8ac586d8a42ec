"""Read a ROS 2 XML launch file into the list of node processes to start (no ROS needed).

The subset of the standard XML frontend this package's launch files use, with the standard
meaning, so the same files run unchanged with the standard launcher:

    <launch>                               root
    <arg name default description/>        argument; without default it must be given
    <let name value/>                      set a variable in the current scope
    <node pkg exec name namespace output on_exit args if unless>
        <param name value/>                one parameter (the value is read as YAML by the node)
        <param from="file.yaml"/>          a ROS 2 parameter file
        <remap from to/>                   a topic or service remapping
        <env name value/>                  an environment variable of this node
    <include file if unless>               another launch file ...
        <arg name value/>                  ... with these argument values
    <group scoped if unless>               a scope; <push-ros-namespace namespace/> inside it
                                           (also spelled push_ros_namespace) prefixes its nodes

Substitutions in attribute values: $(var NAME), $(env NAME [DEFAULT]), $(find-pkg-share PKG),
$(dirname) (the directory of the file being read); they nest: $(var $(var which)).
if/unless take "true"/"false" (also 1/0, case-insensitive). An included file sees the
variables of the including scope and its own <arg> values; what it sets stays inside it. As with
the standard launcher, an argument already set (on the command line, by the <include>, or in the
including scope) keeps its value over its default.

Anything else (another tag, attribute or substitution) is refused with LaunchFileError naming
the file, the element and what is supported, rather than silently ignored.
"""

import os
import re
import sys
from dataclasses import dataclass, field
from pathlib import Path
from xml.etree import ElementTree

PACKAGE = "riskbound"


class LaunchFileError(Exception):
    """A launch file cannot be read or uses something this runner does not support."""


@dataclass
class NodeAction:
    """One node process: what to run and the ROS arguments it gets."""

    package: str
    executable: str
    name: str                 # '' when the file gives none (the node keeps its own name)
    namespace: str            # absolute, '/' for the root
    output: str               # screen | log | both
    on_exit_shutdown: bool    # on_exit="shutdown": the launch ends when this node ends
    arguments: list = field(default_factory=list)   # args="..." before --ros-args
    parameters: list = field(default_factory=list)  # ("file", path) or ("value", name, text), in order
    remappings: list = field(default_factory=list)  # (from, to)
    environment: dict = field(default_factory=dict)
    source: str = ""          # file that declared it, for messages

    @property
    def label(self):
        """The name used in messages and log file names."""
        return self.name or self.executable

    def ros_arguments(self):
        """--ros-args ... for the node's command line."""
        words = ["--ros-args"]
        if self.name:
            words += ["-r", f"__node:={self.name}"]
        if self.namespace != "/":
            words += ["-r", f"__ns:={self.namespace}"]
        for parameter in self.parameters:
            if parameter[0] == "file":
                words += ["--params-file", parameter[1]]
            else:
                # rcl reads the value as YAML and refuses an empty one; '' is YAML's empty string.
                words += ["-p", f"{parameter[1]}:={parameter[2] or chr(39) * 2}"]
        for source, target in self.remappings:
            words += ["-r", f"{source}:={target}"]
        return words


@dataclass
class ArgumentInfo:
    name: str
    default: object  # None: required
    description: str


_TRUE, _FALSE = ("true", "1"), ("false", "0")
_NODE_ATTRIBUTES = {"pkg", "exec", "name", "namespace", "output", "on_exit", "args", "if", "unless"}
_OUTPUTS = ("screen", "log", "both")


def package_share(package):
    """Share directory of an installed package, or for this package its source tree.

    Looked up in order: AMENT_PREFIX_PATH (a colcon install or a sourced ROS 2), the Python
    prefix (`pip install .` puts share/riskbound there), and, for riskbound only, the source
    tree this module runs from (an editable install), recognised by its package.xml.
    """
    prefixes = [p for p in os.environ.get("AMENT_PREFIX_PATH", "").split(os.pathsep) if p]
    for prefix in prefixes:
        if (Path(prefix) / "share" / "ament_index" / "resource_index" / "packages" / package).is_file():
            return Path(prefix) / "share" / package
    candidate = Path(sys.prefix) / "share" / package
    if (candidate / "package.xml").is_file():
        return candidate
    if package == PACKAGE:
        source_root = Path(__file__).resolve().parents[3]
        if (source_root / "package.xml").is_file() and (source_root / "launch").is_dir():
            return source_root
    raise LaunchFileError(f"$(find-pkg-share {package}): package not found in AMENT_PREFIX_PATH "
                          f"({os.pathsep.join(prefixes) or 'not set'}) or {Path(sys.prefix) / 'share'}")


def resolve_launch_file(text):
    """A path to an existing file, or the name of one in riskbound's launch directory."""
    path = Path(text)
    if path.is_file():
        return path.resolve()
    if path.parent == Path("."):
        candidate = package_share(PACKAGE) / "launch" / text
        if candidate.is_file():
            return candidate
    raise LaunchFileError(f"{text}: no such launch file (nor in {PACKAGE}'s launch directory)")


# --- substitutions ---------------------------------------------------------------------------------

def _parse_text(text, pos, context):
    """Literal text with substitutions → list of parts (str or (command, [arg parts]))."""
    parts, literal = [], []
    while pos < len(text):
        if text.startswith("$(", pos):
            if literal:
                parts.append("".join(literal))
                literal = []
            substitution, pos = _parse_substitution(text, pos + 2, context)
            parts.append(substitution)
        else:
            literal.append(text[pos])
            pos += 1
    if literal:
        parts.append("".join(literal))
    return parts


def _parse_substitution(text, pos, context):
    match = re.compile(r"\s*([A-Za-z][\w-]*)").match(text, pos)
    if not match:
        raise LaunchFileError(f"{context}: '$(' without a substitution name in {text!r}")
    command, pos = match.group(1), match.end()
    arguments = []
    while True:
        while pos < len(text) and text[pos].isspace():
            pos += 1
        if pos >= len(text):
            raise LaunchFileError(f"{context}: unterminated $({command} ...) in {text!r}")
        if text[pos] == ")":
            return (command, arguments), pos + 1
        word = []
        while pos < len(text) and not text[pos].isspace() and text[pos] != ")":
            if text.startswith("$(", pos):
                substitution, pos = _parse_substitution(text, pos + 2, context)
                word.append(substitution)
            elif text[pos] in "'\"":
                end = text.find(text[pos], pos + 1)
                if end < 0:
                    raise LaunchFileError(f"{context}: unterminated quote in {text!r}")
                word.append(text[pos + 1:end])
                pos = end + 1
            else:
                word.append(text[pos])
                pos += 1
        arguments.append(word)


class _Scope:
    """Variables and namespace of the part of a file being read."""

    def __init__(self, variables, namespace, file_path):
        self.variables = dict(variables)
        self.namespace = namespace
        self.file_path = file_path

    def child(self, file_path=None):
        return _Scope(self.variables, self.namespace, file_path or self.file_path)

    def evaluate(self, text, context):
        return "".join(self._value(part, context) for part in _parse_text(text, 0, context))

    def _value(self, part, context):
        if isinstance(part, str):
            return part
        command, arguments = part
        values = ["".join(self._value(p, context) for p in word) for word in arguments]
        if command == "var" and len(values) == 1:
            if values[0] not in self.variables:
                raise LaunchFileError(f"{context}: $(var {values[0]}) is not defined (defined: "
                                      f"{', '.join(sorted(self.variables)) or 'none'})")
            return self.variables[values[0]]
        if command == "env" and len(values) in (1, 2):
            if values[0] in os.environ:
                return os.environ[values[0]]
            if len(values) == 2:
                return values[1]
            raise LaunchFileError(f"{context}: $(env {values[0]}): environment variable not set and no default")
        if command == "find-pkg-share" and len(values) == 1:
            return str(package_share(values[0]))
        if command == "dirname" and not values:
            return str(self.file_path.parent)
        raise LaunchFileError(f"{context}: $({command}{''.join(' ' + v for v in values)}) is not supported; "
                              "supported: $(var NAME), $(env NAME [DEFAULT]), $(find-pkg-share PKG), $(dirname)")


def _truth(text, context):
    if text.strip().lower() in _TRUE:
        return True
    if text.strip().lower() in _FALSE:
        return False
    raise LaunchFileError(f"{context}: {text!r} is not a boolean (true/false/1/0)")


def declared_arguments(path):
    """ArgumentInfo of each top-level <arg> of a launch file, defaults unevaluated (for `riskbound launch --arguments`)."""
    return [ArgumentInfo(e.get("name", ""), e.get("default"), e.get("description", ""))
            for e in LaunchDescription._root(Path(path)) if e.tag == "arg"]


# --- elements --------------------------------------------------------------------------------------

class LaunchDescription:
    """The nodes of a launch file and its included files, with the given argument values."""

    def __init__(self, path, arguments=None):
        self.path = Path(path).resolve()
        self.nodes = []
        given = dict(arguments or {})
        self._declared = set()
        root = self._root(self.path)
        self._read_children(root, _Scope(given, "/", self.path))
        unknown = sorted(set(given) - self._declared)
        if unknown:
            raise LaunchFileError(f"{self.path.name}: no argument named {', '.join(unknown)} (declared: "
                                  f"{', '.join(sorted(self._declared)) or 'none'})")

    @staticmethod
    def _root(path):
        try:
            root = ElementTree.parse(path).getroot()
        except (OSError, ElementTree.ParseError) as error:
            raise LaunchFileError(f"{path}: cannot read launch file: {error}") from None
        if root.tag != "launch":
            raise LaunchFileError(f"{path}: root element is <{root.tag}>, expected <launch>")
        return root

    def _read_children(self, element, scope):
        for child in element:
            if not isinstance(child.tag, str):
                continue  # comments and processing instructions
            context = f"{scope.file_path.name}: <{child.tag}{self._describe(child)}>"
            if not self._condition(child, scope, context):
                continue
            if child.tag == "arg":
                self._arg(child, scope, context)
            elif child.tag == "let":
                self._require(child, {"name", "value"}, context)
                scope.variables[child.get("name")] = scope.evaluate(child.get("value", ""), context)
            elif child.tag == "node":
                self.nodes.append(self._node(child, scope, context))
            elif child.tag == "include":
                self._include(child, scope, context)
            elif child.tag == "group":
                scoped = _truth(scope.evaluate(child.get("scoped", "true"), context), context)
                self._read_children(child, scope.child() if scoped else scope)
            elif child.tag in ("push-ros-namespace", "push_ros_namespace"):
                scope.namespace = _join_namespace(scope.namespace, scope.evaluate(child.get("namespace", ""), context))
            else:
                raise LaunchFileError(f"{context}: element not supported by this runner; supported: arg, let, "
                                      "node, include, group, push-ros-namespace")

    @staticmethod
    def _describe(element):
        for key in ("name", "exec", "file"):
            if key in element.attrib:
                return f" {key}='{element.get(key)}'"
        return ""

    @staticmethod
    def _require(element, allowed, context):
        extra = sorted(set(element.attrib) - set(allowed) - {"if", "unless"})
        if extra:
            raise LaunchFileError(f"{context}: attribute {', '.join(extra)} not supported here; "
                                  f"supported: {', '.join(sorted(allowed))}")

    @staticmethod
    def _condition(element, scope, context):
        if "if" in element.attrib and not _truth(scope.evaluate(element.get("if"), context), context):
            return False
        if "unless" in element.attrib and _truth(scope.evaluate(element.get("unless"), context), context):
            return False
        return True

    def _arg(self, element, scope, context):
        """As the standard launcher: a value already set (given on the command line, by an <include>,
        or inherited from the including scope) wins over the default."""
        self._require(element, {"name", "default", "description"}, context)
        name = element.get("name")
        if not name:
            raise LaunchFileError(f"{context}: <arg> needs a name")
        default = element.get("default")
        self._declared.add(name)
        if name in scope.variables:
            return
        if default is None:
            raise LaunchFileError(f"{scope.file_path.name}: argument '{name}' is required: give {name}:=VALUE"
                                  + (f" ({element.get('description')})" if element.get("description") else ""))
        scope.variables[name] = scope.evaluate(default, context)

    def _node(self, element, scope, context):
        self._require(element, _NODE_ATTRIBUTES, context)
        evaluate = lambda key, default="": scope.evaluate(element.get(key, default), context)  # noqa: E731
        package, executable = evaluate("pkg"), evaluate("exec")
        if not package or not executable:
            raise LaunchFileError(f"{context}: <node> needs pkg and exec")
        output = evaluate("output", "log")
        if output not in _OUTPUTS:
            raise LaunchFileError(f"{context}: output={output!r} is not supported; supported: {', '.join(_OUTPUTS)}")
        on_exit = evaluate("on_exit")
        if on_exit not in ("", "shutdown"):
            raise LaunchFileError(f"{context}: on_exit={on_exit!r} is not supported; supported: shutdown")
        node = NodeAction(package=package, executable=executable, name=evaluate("name"),
                          namespace=_join_namespace(scope.namespace, evaluate("namespace")), output=output,
                          on_exit_shutdown=on_exit == "shutdown", arguments=evaluate("args").split(),
                          source=str(scope.file_path))
        for child in element:
            if not isinstance(child.tag, str):
                continue
            child_context = f"{context} <{child.tag}{self._describe(child)}>"
            if not self._condition(child, scope, child_context):
                continue
            if child.tag == "param":
                node.parameters.append(self._param(child, scope, child_context))
            elif child.tag == "remap":
                self._require(child, {"from", "to"}, child_context)
                node.remappings.append((scope.evaluate(child.get("from", ""), child_context),
                                        scope.evaluate(child.get("to", ""), child_context)))
            elif child.tag == "env":
                self._require(child, {"name", "value"}, child_context)
                node.environment[child.get("name")] = scope.evaluate(child.get("value", ""), child_context)
            else:
                raise LaunchFileError(f"{child_context}: not supported inside <node>; supported: param, remap, env")
        return node

    def _param(self, element, scope, context):
        self._require(element, {"name", "value", "from"}, context)
        if "from" in element.attrib:
            # Relative to the working directory, as the standard launcher reads it.
            path = Path(scope.evaluate(element.get("from"), context)).resolve()
            if not path.is_file():
                raise LaunchFileError(f"{context}: parameter file {path} does not exist")
            return ("file", str(path))
        if "name" not in element.attrib or "value" not in element.attrib:
            raise LaunchFileError(f"{context}: <param> needs name and value, or from (nested parameters are "
                                  "not supported)")
        return ("value", scope.evaluate(element.get("name"), context), scope.evaluate(element.get("value"), context))

    def _include(self, element, scope, context):
        self._require(element, {"file"}, context)
        path = Path(scope.evaluate(element.get("file", ""), context))
        if not path.is_absolute() and not path.is_file():
            path = scope.file_path.parent / path  # also found next to the including file
        if not path.is_file():
            raise LaunchFileError(f"{context}: included file {path} does not exist")
        values = {}
        for child in element:
            if not isinstance(child.tag, str):
                continue
            child_context = f"{context} <{child.tag}{self._describe(child)}>"
            if child.tag != "arg":
                raise LaunchFileError(f"{child_context}: only <arg name value> is supported inside <include>")
            self._require(child, {"name", "value"}, child_context)
            values[child.get("name")] = scope.evaluate(child.get("value", ""), child_context)
        inner = scope.child(path.resolve())
        inner.variables.update(values)
        self._read_children(self._root(path), inner)


def _join_namespace(outer, inner):
    """Namespace `inner` (absolute, or relative to `outer`) as an absolute name."""
    inner = inner.strip()
    if inner.startswith("/"):
        joined = inner
    elif inner:
        joined = outer.rstrip("/") + "/" + inner
    else:
        joined = outer
    return "/" + joined.strip("/") if joined.strip("/") else "/"
