"""Pascal VOC XML annotations: one ``<annotation>`` file per image.

The layout of the VOC devkit (Everingham et al., IJCV 2010): ``size/width``,
``size/height`` and per ``object`` its ``name``, ``bndbox`` (``xmin ymin xmax ymax``,
pixel corners as written: the pixel convention belongs to the protocol) and the flags
``difficult``, ``truncated`` and ``occluded`` where present. ``difficult`` is the
engine's difficult flag; ``truncated`` (a yes/no flag in VOC) becomes truncation 1.0
or 0.0 and ``occluded`` occlusion level 1 or 0; absent, they stay "not given".

Parsing is safe by construction: the standard library's expat parser with every
entity declaration and external reference refused (no entity expansion bombs, no
reads of local files or URLs), and no tree object model beyond what is needed.
"""

import re
import xml.parsers.expat

from ..errors import InputError


class _Node:
    __slots__ = ("tag", "children", "text", "line")

    def __init__(self, tag, line):
        self.tag, self.children, self.text, self.line = tag, [], [], line

    def find(self, tag):
        for child in self.children:
            if child.tag == tag:
                return child
        return None

    def value(self, spaces=None):
        """The element's text, stripped of ``spaces`` (default: any Unicode space)."""
        return "".join(self.text).strip(spaces)


def parse_xml(path, name, data):
    """The document's root ``_Node``; entity declarations are refused."""
    parser = xml.parsers.expat.ParserCreate()
    parser.SetParamEntityParsing(xml.parsers.expat.XML_PARAM_ENTITY_PARSING_NEVER)
    stack = [_Node("", 0)]

    def refuse(*_):
        raise InputError(
            path,
            "the XML declares entities (refused: entity expansion and external references "
            "are a known attack, and VOC annotations need none)",
            record=f"{name} line {parser.CurrentLineNumber}",
        )

    def start(tag, _attrs):
        node = _Node(tag, parser.CurrentLineNumber)
        stack[-1].children.append(node)
        stack.append(node)

    def end(_tag):
        stack.pop()

    def text(data):
        stack[-1].text.append(data)

    parser.EntityDeclHandler = refuse
    parser.UnparsedEntityDeclHandler = refuse
    parser.ExternalEntityRefHandler = refuse
    parser.StartElementHandler = start
    parser.EndElementHandler = end
    parser.CharacterDataHandler = text
    try:
        parser.Parse(data, True)
    except xml.parsers.expat.ExpatError as e:
        raise InputError(
            path,
            f"not well-formed XML: {xml.parsers.expat.errors.messages[e.code]}",
            record=f"{name} line {e.lineno}",
        ) from None
    except InputError:
        raise
    except (LookupError, ValueError) as e:  # UnicodeError is a ValueError
        # expat asks Python's codecs for an encoding it lacks; an unknown name, a
        # multi-byte or a non-text codec fails there
        raise InputError(
            path,
            f"the XML declares the encoding {_declared(data)!r}, which the parser cannot "
            f"read ({e}); write the file as UTF-8",
            record=f"{name} line {parser.CurrentLineNumber}",
            field="encoding",
        ) from None
    return stack[0].children[0]


def _declared(data):
    """The encoding an XML declaration names (bytes before any markup: ASCII)."""
    m = re.match(rb"""\s*<\?xml[^>]*?encoding\s*=\s*["']([^"']*)""", bytes(data[:400]))
    return m[1].decode("ascii", "replace") if m else ""


#: A number as the devkit's files write one: ASCII digits, an optional sign, point and
#: exponent, C's whitespace around (space, \t, \n, \v, \f, \r: C standard ``isspace``,
#: from memory; ``\s`` and ``str.strip()`` would take a no-break or ideographic space
#: too, red team audit11 F7). Python's ``float`` reads "1_000", "٣00" and "inf" too.
_C_SPACES = " \t\n\r\f\v"
_DECIMAL = re.compile(
    r"[ \t\n\r\f\v]*[+-]?([0-9]+\.?[0-9]*|\.[0-9]+)([eE][+-]?[0-9]+)?[ \t\n\r\f\v]*\Z"
)


def _number(path, name, node, field, required=True):
    where = f"{name} line {node.line}" if node is not None else name
    if node is None:
        if required:
            raise InputError(path, "missing", record=where, field=field)
        return None
    text = node.value(_C_SPACES)
    try:
        if not _DECIMAL.match(text):  # float() also reads "1_000" and other scripts' digits
            raise ValueError(text)
        value = float(text)
    except ValueError:
        raise InputError(
            path, f"expected a number, got {text!r}", record=where, field=field
        ) from None
    if value != value or value in (float("inf"), float("-inf")):
        raise InputError(path, "must be a finite number", record=where, field=field)
    return value


def _flag(path, name, node, field):
    """0/1 flag; None when absent or empty (the devkit's files leave some empty)."""
    if node is None or not node.value():
        return None
    text = node.value()
    if text not in ("0", "1"):
        raise InputError(
            path, f"expected 0 or 1, got {text!r}", record=f"{name} line {node.line}", field=field
        )
    return text == "1"


def parse(path, name, data):
    """``(width, height, objects)`` of one annotation file; sizes None if absent.

    Each object: ``(line, class_name, [x, y, w, h], difficult, truncated, occluded)``
    with the flags True/False/None."""
    root = parse_xml(path, name, data)
    if root.tag != "annotation":
        raise InputError(
            path, f"expected an <annotation> element, got <{root.tag}>", record=f"{name} line 1"
        )
    size = root.find("size")
    width = _number(path, name, size.find("width"), "size/width") if size is not None else None
    height = _number(path, name, size.find("height"), "size/height") if size is not None else None
    objects = []
    for obj in root.children:
        if obj.tag != "object":
            continue
        where = f"{name} line {obj.line}"
        label = obj.find("name")
        if label is None or not label.value():
            raise InputError(path, "the object has no name", record=where, field="name")
        box = obj.find("bndbox")
        if box is None:
            raise InputError(path, "missing", record=where, field="bndbox")
        x1, y1, x2, y2 = (
            _number(path, name, box.find(c), f"bndbox/{c}")
            for c in ("xmin", "ymin", "xmax", "ymax")
        )
        objects.append(
            (
                obj.line,
                label.value(),
                [x1, y1, x2, y2],  # corners as read (label_folders keeps them)
                _flag(path, name, obj.find("difficult"), "difficult"),
                _flag(path, name, obj.find("truncated"), "truncated"),
                _flag(path, name, obj.find("occluded"), "occluded"),
            )
        )
    return width, height, objects
