"""Reading YAML specs (protocols, system files) with the key path of every value.

A :class:`Node` wraps one YAML value with the file it came from and its key path, so
every check can raise the one error form boost uses::

    protocol.yaml: run.timestep must be a time with its unit, such as '2 fs'. Got '2' instead.

Only safe YAML loading is used; duplicate keys are errors.
"""

import difflib
import os
import stat
import unicodedata
from pathlib import Path

import yaml

from .exceptions import InputError, ProtocolError, printable, where
from .limits import MAX_SPEC_BYTES
from .units import parse_quantity, show_value

_MISSING = object()


class _StrictLoader(yaml.SafeLoader):
    """Safe loader that refuses duplicate keys instead of keeping the last one."""

    def construct_object(self, node, deep=False):
        # PyYAML's scalar constructors raise plain errors on text such as '!!int abc',
        # '!!bool maybe' or the date 2001-13-45; give them the YAML error form and line.
        try:
            return super().construct_object(node, deep=deep)
        except (ValueError, TypeError, KeyError, AttributeError, OverflowError):
            tag = str(node.tag).replace("tag:yaml.org,2002:", "!!")
            raise yaml.constructor.ConstructorError(
                None, None, f"this is not a valid {tag} value", node.start_mark) from None


def _construct_mapping(loader, node, deep=False):
    if not isinstance(node, yaml.MappingNode):  # '!!map' on a scalar or a list
        raise yaml.constructor.ConstructorError(
            None, None, f"expected a mapping, but found {node.id}", node.start_mark)
    # Keys written here must be distinct; keys merged in with '<<' may be overridden by them.
    own = [(key_node, key_node.tag == "tag:yaml.org,2002:merge") for key_node, _ in node.value]
    loader.flatten_mapping(node)
    for key_node, _ in node.value:
        key = loader.construct_object(key_node, deep=deep)
        if not isinstance(key, (str, int, float, bool)) and key is not None:
            raise yaml.constructor.ConstructorError(
                None, None, "keys must be plain text", key_node.start_mark)
    seen = {}
    for key_node, is_merge in own:
        key = ("<<",) if is_merge else loader.construct_object(key_node, deep=deep)  # no text equals ("<<",)
        if key in seen:
            shown = "'<<'" if is_merge else show_value(key)
            raise yaml.constructor.ConstructorError(
                None, None, f"duplicate key {shown}", key_node.start_mark)
        seen[key] = True
    return loader.construct_mapping(node, deep=deep)


_StrictLoader.add_constructor(yaml.resolver.BaseResolver.DEFAULT_MAPPING_TAG, _construct_mapping)


def parse_yaml(text, file):
    """Parse YAML text into a :class:`Node`; syntax errors name the file and line."""
    name = printable(file)
    try:
        data = yaml.load(text, Loader=_StrictLoader)  # noqa: S506 (a SafeLoader subclass)
    except yaml.MarkedYAMLError as err:
        mark = err.problem_mark or err.context_mark
        line = f" at line {mark.line + 1}, column {mark.column + 1}" if mark else ""
        raise ProtocolError(f"{name}: is not valid YAML{line}: {printable(err.problem or err.context)}.") from None
    except yaml.reader.ReaderError as err:  # its str() spans two lines
        raise ProtocolError(f"{name}: is not valid YAML: character #x{err.character:04x} at position "
                            f"{err.position} is not allowed in YAML.") from None
    except yaml.YAMLError as err:
        raise ProtocolError(f"{name}: is not valid YAML: {printable(' '.join(str(err).split()))}.") from None
    except RecursionError:
        raise ProtocolError(f"{name}: is nested too deeply to read.") from None
    return Node(data, file, "")


#: What :func:`file_problem` says of a path where nothing is.
MISSING_FILE = "does not exist"
#: What :func:`file_problem` says of a folder.
FOLDER = "is a folder, not a file"


def file_problem(path):
    """Why ``path`` is not a regular file to read, as a clause ("is a folder, not a file"), or None.

    Only looks (stat): a FIFO or a device is never opened, since reading one may block
    or never end.
    """
    try:
        mode = os.stat(path).st_mode
    except (FileNotFoundError, NotADirectoryError):
        return MISSING_FILE
    except ValueError:                                   # a NUL character in the path
        return "is not a valid path (it holds a NUL character)"
    except OSError as err:
        return f"cannot be read ({err.strerror})"
    if stat.S_ISREG(mode):
        return None
    if stat.S_ISDIR(mode):
        return FOLDER
    kind = ("a FIFO" if stat.S_ISFIFO(mode) else "a device" if stat.S_ISCHR(mode) or stat.S_ISBLK(mode)
            else "a socket" if stat.S_ISSOCK(mode) else "a special file")
    return f"is not a regular file ({kind})"


def read_text(path, what, max_bytes=None):
    """Read a regular UTF-8 text file, turning every problem into one InputError line.

    The message never quotes the file's content. ``max_bytes``: refuse a larger file
    without reading it.
    """
    path, shown = Path(path), printable(path)
    problem = file_problem(path)
    if problem == MISSING_FILE:
        raise InputError(f"{shown}: {what} file not found.")
    if problem is not None:
        raise InputError(f"{shown}: {problem}; a {what} file is expected.")
    try:
        # O_NONBLOCK: should the path have become a FIFO since the look above, opening it
        # does not wait for a writer; fstat then refuses it.
        descriptor = os.open(path, os.O_RDONLY | getattr(os, "O_NONBLOCK", 0))
        with open(descriptor, encoding="utf-8") as handle:
            status = os.fstat(descriptor)
            if not stat.S_ISREG(status.st_mode):
                raise InputError(f"{shown}: is not a regular file; a {what} file is expected.")
            if max_bytes is not None and status.st_size > max_bytes:
                raise InputError(f"{shown}: a {what} file must be at most {max_bytes} bytes. "
                                 f"Got {status.st_size} bytes instead.")
            return handle.read()
    except UnicodeDecodeError:
        raise InputError(f"{shown}: {what} file is not UTF-8 text.") from None
    except InputError:
        raise
    except OSError as err:
        raise InputError(f"{shown}: {what} file cannot be read ({err.strerror}).") from None


class _Dumper(yaml.SafeDumper):
    """Mappings in block style, in their order; lists of plain values in flow style ([a, b])."""

    def represent_dict(self, data):
        return self.represent_mapping("tag:yaml.org,2002:map", data, flow_style=False)

    def represent_list(self, data):
        plain = not any(isinstance(item, (dict, list)) for item in data)
        return self.represent_sequence("tag:yaml.org,2002:seq", data, flow_style=plain)


_Dumper.add_representer(dict, _Dumper.represent_dict)
_Dumper.add_representer(list, _Dumper.represent_list)


def dump_yaml(value):
    """YAML text of plain data (mappings, lists, text, numbers) that :func:`parse_yaml` reads back."""
    return yaml.dump(value, Dumper=_Dumper, sort_keys=False, allow_unicode=True, width=100)


def load_yaml(path, what="protocol"):
    """Read and parse a YAML file (at most MAX_SPEC_BYTES) into a :class:`Node`."""
    return parse_yaml(read_text(path, what, max_bytes=MAX_SPEC_BYTES), Path(path))


#: Largest whole number a key takes when it names no bound of its own (a signed 64-bit integer).
LARGEST_INTEGER = 2**63 - 1


class Node:
    """One value of a YAML document, with its file and key path for error messages."""

    def __init__(self, value, file, path):
        self.value = value
        self.file = file
        self.path = path

    @property
    def place(self):
        return where(self.file, self.path or "(top level)")

    def fail(self, expected, got=_MISSING):
        got = self.value if got is _MISSING else got
        raise ProtocolError(f"{self.place} must be {expected}. Got {_show(got)} instead.")

    def _child_path(self, key):
        if isinstance(key, int) and not isinstance(key, bool):
            return f"{self.path}[{show_value(key)}]"
        if isinstance(key, str) and not (key.isprintable() and 0 < len(key) <= 80 and key.strip() == key):
            return f"{self.path}[{show_value(key)}]"  # keeps the message on one short, visible line
        return f"{self.path}.{key}" if self.path else str(key)

    # -- mappings ---------------------------------------------------------------------
    def mapping(self, allowed=None, required=(), renamed=None):
        """Check this is a mapping whose keys are all in ``allowed`` and include ``required``.

        ``renamed`` maps a retired spelling to what replaces it; such a key gets a message
        naming the replacement (no silent alias: the file must be changed).
        """
        if not isinstance(self.value, dict):
            if not self.path:      # a whole file: describe it, never quote an arbitrary file
                raise ProtocolError(f"{self.place} must be a mapping of keys to values. "
                                    f"Got {_describe(self.value)} instead.")
            self.fail("a mapping of keys to values")
        for key, replacement in (renamed or {}).items():
            if key in self.value:
                raise ProtocolError(f"{where(self.file, self._child_path(key))} is no longer read; "
                                    f"write {replacement} instead.")
        if allowed is not None:
            for key in self.value:
                if key not in allowed:
                    hint = difflib.get_close_matches(key, [str(a) for a in allowed], n=1) \
                        if isinstance(key, str) and len(key) <= 80 else []
                    suggestion = f" Did you mean '{hint[0]}'?" if hint else ""
                    options = ", ".join(sorted(str(a) for a in allowed))
                    raise ProtocolError(
                        f"{where(self.file, self._child_path(key))} is not a known key.{suggestion}"
                        f" Known keys here: {options}.")
        for key in required:
            if key not in self.value:
                raise ProtocolError(f"{where(self.file, self._child_path(key))} is required but missing.")
        return self

    def has(self, key):
        return isinstance(self.value, dict) and key in self.value

    def get(self, key, default=_MISSING):
        """The child node at ``key``; a missing key gives ``default`` wrapped, or an error."""
        if not isinstance(self.value, dict):
            self.fail("a mapping of keys to values")
        if key in self.value:
            return Node(self.value[key], self.file, self._child_path(key))
        if default is _MISSING:
            raise ProtocolError(f"{where(self.file, self._child_path(key))} is required but missing.")
        return Node(default, self.file, self._child_path(key))

    def items(self):
        self.mapping()
        return [(key, Node(value, self.file, self._child_path(key))) for key, value in self.value.items()]

    def sequence(self, min_length=0, max_length=None):
        if not isinstance(self.value, list):
            self.fail("a list")
        if len(self.value) < min_length:
            self.fail(f"a list of at least {min_length} item{'s' if min_length != 1 else ''}")
        if max_length is not None and len(self.value) > max_length:
            raise ProtocolError(f"{self.place} must be a list of at most {max_length} items. "
                                f"Got {len(self.value)} items instead.")
        return [Node(item, self.file, self._child_path(i)) for i, item in enumerate(self.value)]

    # -- scalars ----------------------------------------------------------------------
    def text(self, choices=None):
        if not isinstance(self.value, str) or not self.value.strip():
            self.fail("a non-empty text" if choices is None else "one of " + ", ".join(map(repr, choices)))
        if choices is not None and self.value not in choices:
            self.fail("one of " + ", ".join(map(repr, choices)))
        return self.value

    def line(self, max_length):
        """Text for one terminal line (a title): printable, at most ``max_length`` characters.

        A refused text is described, never echoed: it may hold terminal control sequences.
        """
        self.text()
        if len(self.value) > max_length:
            raise ProtocolError(f"{self.place} must be at most {max_length} characters long. "
                                f"Got {len(self.value)} characters instead.")
        for i, char in enumerate(self.value):
            if not (char.isprintable() or unicodedata.category(char) == "Zs"):   # Zs: spaces such as U+00A0
                raise ProtocolError(f"{self.place} must be printable text on one line (no control "
                                    f"characters). Got U+{ord(char):04X} at character {i + 1} instead.")
        return self.value

    def integer(self, minimum=None, maximum=None):
        expected = "a whole number" + (f" of at least {minimum}" if minimum is not None else "")
        if maximum is not None:
            expected += f"{' and' if minimum is not None else ' of'} at most {maximum}"
        if isinstance(self.value, bool) or not isinstance(self.value, int):
            self.fail(expected)
        if (minimum is not None and self.value < minimum) or (maximum is not None and self.value > maximum):
            self.fail(expected)
        if maximum is None and abs(self.value) > LARGEST_INTEGER:    # what SQLite and numpy hold
            self.fail(f"{expected} and of at most {LARGEST_INTEGER} in size")
        return self.value

    def number(self):
        if isinstance(self.value, bool) or not isinstance(self.value, (int, float)):
            self.fail("a plain number")
        if self.value != self.value or abs(self.value) == float("inf"):
            self.fail("a finite number")
        return float(self.value)

    def boolean(self):
        if not isinstance(self.value, bool):
            self.fail("true or false")
        return self.value

    def quantity(self, dimension, *, positive=False, non_negative=False):
        """A float in OpenMM's MD unit (see :func:`boost.units.parse_quantity`)."""
        number = parse_quantity(self.value, dimension, place=self.place)
        if positive and number <= 0:
            self.fail(f"positive, such as '{_example(dimension)}'")
        if non_negative and number < 0:
            self.fail(f"zero or positive, such as '{_example(dimension)}'")
        return number

    def path_value(self, base_dir):
        """A file path, relative to ``base_dir`` (the folder of the file it is written in)."""
        text = self.text()
        try:
            path = Path(text).expanduser()
        except RuntimeError:                             # '~name' of no known user
            self.fail("a path whose leading '~' names a known user")
        return path if path.is_absolute() else (Path(base_dir) / path)


def _describe(value):
    """What a value is, without its content: for whole files, which may be anything."""
    if value is None:
        return "an empty document"
    if isinstance(value, str):
        return f"a text of {len(value)} characters"
    if isinstance(value, list):
        return f"a list of {len(value)} items"
    return f"a single {type(value).__name__} value"


def _example(dimension):
    from .units import DIMENSIONS
    return DIMENSIONS[dimension][3]


_show = show_value


def differing_paths(a, b, prefix=""):
    """Key paths (``run.production``) at which two parsed YAML trees differ, in document order."""
    if isinstance(a, dict) and isinstance(b, dict):
        paths = []
        for key in list(a) + [k for k in b if k not in a]:
            child = f"{prefix}.{key}" if prefix else str(key)
            if key not in a or key not in b:
                paths.append(child)
            else:
                paths += differing_paths(a[key], b[key], child)
        return paths
    same = type(a) is type(b) and a == b
    return [] if same else [prefix or "(the whole document)"]
