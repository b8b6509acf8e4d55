"""Image, class and annotation ids: typed as pycocotools types them, shown as written.

CSV and label-file ids are text: integers when every id is one (``csv_ids``; ASCII
digits only, ``INTEGER``), else text.

COCO-style JSON ids are whatever JSON value the file gives; pycocotools keys its dicts by
them, so (checked against pycocotools 2.0.11 in ``tests/engine/test_any_ids.py``):

* ``1``, ``1.0`` and ``true`` are one id (Python's ``1 == 1.0 == True``) while the text
  ``"1"`` is another; an annotation or detection whose id has the other type refers to
  nothing (pycocotools leaves the annotation out and refuses the detections file);
* image and category ids are sorted (``sorted``, then ``np.unique``): numbers by value,
  text by code point; a family mixing text and numbers cannot be sorted (pycocotools
  raises ``TypeError``) and is refused here, naming the record;
* annotation ids are never sorted, so they may mix text and numbers;
* a ``null`` reference (an annotation's ``image_id``, ``category_id`` or ``id``, a
  detection's ``category_id``) names nothing: the annotation is left out, the
  detection's class is one the split does not list; an image or category whose own id
  is null is refused, naming the record.

An id family that is not all 64-bit integers is read as *typed keys*: text made of a
type mark and the id (``"\\x1d2.5"`` for the number 2.5, ``"\\x1eimg_7"`` for the text
``img_7``), so ids match only their own type and every comparison is between strings.
``GroundTruth`` keeps the ids as display text (``display``) with the family's type
(``GroundTruth.image_id_type``: ``"number"``, ``"text"``, or ``"json"`` for text ids
that numpy's text arrays cannot hold as written — ending in U+0000 — or that no UTF-8
text can hold — a lone UTF-16 surrogate, which Python's ``json`` reads from an escape
such as ``"\\ud800"`` — shown JSON-quoted, each surrogate as its escape: ``"a\\ud800"``).
The typed keys hold the very ``str`` Python's ``json`` gives, so ids compare and sort as
in pycocotools; only what is shown or written is escaped (``escaped``, ``quoted``).

Image ids pycocotools' ``evaluate`` loses (``unique_lost``): it runs
``p.imgIds = list(np.unique(p.imgIds))`` and looks each image up by those numpy values,
so an id numpy does not hold as written (rounded to float64, a trailing U+0000 cut, a
NaN in a float64 array, which equals nothing) names no image there: its ground truth
and detections are never scored. A NaN id is otherwise an id like any other: Python's
``json`` gives one NaN object for every ``NaN`` literal (``FILE_NAN``), which
pycocotools' dicts and numpy's object arrays find by identity.
"""

import json
import json.decoder
import re

import numpy as np

#: An integer id: ASCII digits only (``\\d`` and ``str.isdigit`` take other scripts'
#: digits and superscripts, which ``int`` reads or refuses: ``٣`` would be image 3).
INTEGER = re.compile(r"[+-]?[0-9]+\Z")
SURROGATE = re.compile("[\ud800-\udfff]")
INT64 = (-(2**63), 2**63 - 1)
NUMBER, TEXT, NULL = "\x1d", "\x1e", "\x1f"  # the type marks of typed keys
#: The file's NaN: Python's ``json`` gives this one object for every ``NaN`` literal,
#: which pycocotools' dicts (and numpy object arrays, which hold it as it is) find by
#: identity; numpy's float64 NaN is another object and equals nothing.
FILE_NAN = json.decoder.NaN
#: A COCO JSON id field as decoded: any JSON number, boolean, text or null (a null
#: reference names nothing, as in pycocotools' dicts).
JSON_ID = int | float | bool | str | None


#: How a COCO JSON id was written where ``coco_records.whole_ids`` keyed it as an int
#: (``id_kinds``): numpy's type discovery, unlike a dict, tells them apart.
AS_KEYED, BOOLEAN, WHOLE_FLOAT = 0, 1, 2


def id_kinds(values):
    """Per id as decoded from JSON: ``BOOLEAN`` (``true``/``false``), ``WHOLE_FLOAT``
    (``1.0``) or ``AS_KEYED`` (anything pycocotools' dicts key as it is)."""
    if set(map(type, values)) <= {int}:
        return np.zeros(len(values), np.uint8)
    kinds = [
        BOOLEAN if type(v) is bool else WHOLE_FLOAT if type(v) is float and v.is_integer() else 0
        for v in values
    ]
    return np.array(kinds, np.uint8)


def as_written(ids, id_type, kinds):
    """The Python values of a family's ids (``GroundTruth`` ids of ``id_type``) as the
    JSON decoder gave them: ``kinds`` (``id_kinds``) turns the keyed int back into the
    boolean or whole float the file wrote."""
    if ids.dtype.kind == "i" and not id_type:
        values = ids.tolist()
    else:
        values = [key_value(k) for k in keys_of(ids, id_type).tolist()]
    if kinds is not None and kinds.any():
        back = {BOOLEAN: bool, WHOLE_FLOAT: float}
        values = [back[k](v) if k else v for v, k in zip(values, kinds.tolist())]
    return values


def unique_lost(values, listed=None):
    """Positions (ascending) of the ids in ``values`` — a family's distinct ids as the
    JSON decoder gave them (``as_written``) — that pycocotools' ``evaluate`` loses.

    pycocotools 2.0.11 ``COCOeval.evaluate`` sets ``p.imgIds = list(np.unique(p.imgIds))``
    (and ``p.catIds`` alike) and ``_prepare``/``evaluate`` then look images up by those
    numpy values in dicts keyed by the ids as written (``imgToAnns``, ``_gts[imgId,
    catId]``, ``_dts[imgId, catId]``). numpy discovers one dtype for the whole list
    (numpy's "array creation" type discovery: Python ints in int64, else uint64, else
    object; int64 with uint64 or with float gives float64; text gives a ``<U`` array,
    which drops trailing U+0000), so an id it rounds or cuts equals no key: that image is
    evaluated with no ground truth and no detections (``evaluateImg`` returns None),
    and where the changed value equals another id the two are one entry. This runs
    numpy's own ``np.unique`` on the same values and makes the same lookups, so it
    follows whatever the installed numpy does.

    ``listed``: the list ``np.unique`` is run on where it is not ``values`` itself.
    ``p.imgIds`` comes from ``getImgIds()``, the image dict's keys (``values``), but
    ``p.catIds`` from ``getCatIds()``, the categories as the file lists them: a
    category listed twice is there twice, each entry with its own JSON type (``1`` and
    ``1.0``), and those types decide numpy's dtype for every other id.
    """
    listed = values if listed is None else listed
    if not len(values):
        return np.zeros(0, np.int64)
    if all(type(v) is int for v in listed) and -(2**63) <= min(listed) and max(listed) < 2**63:
        return np.zeros(0, np.int64)  # int64: exact
    position = {}
    for n, value in enumerate(values):
        position.setdefault(value, n)
    found = np.zeros(len(values), bool)
    for value in list(np.unique(listed)):  # pycocotools' own line, then its lookups
        n = position.get(value)
        if n is not None:
            found[n] = True
    return np.flatnonzero(~found)


def looked_up_ids(listed, distinct=False):
    """The ids of ``listed`` (a family's ids as the file writes them) pycocotools'
    ``evaluate`` looks up: its dict's keys (first written) less those its ``np.unique``
    loses (``unique_lost``). ``distinct``: ``np.unique`` runs on the dict's keys
    (images: ``getImgIds``), else on ``listed`` itself (categories: ``getCatIds``)."""
    listed = list(listed)
    keys = list(dict.fromkeys(listed))
    lost = set(unique_lost(keys, None if distinct else listed).tolist())
    return {key for n, key in enumerate(keys) if n not in lost}


def unique_merged(values):
    """Positions (ascending) of the distinct ids in ``values`` (as written) whose
    ``np.unique`` value is another id's entry: ids numpy rounds to one value are one
    entry of ``p.imgIds``, owned by the id that value finds (else the first). The
    CityPersons script divides false positives by the entries (``accumulate``:
    ``fppi = fp / I0``, ``I0 = len(_pe.imgIds)``), so these images are not counted."""
    if not len(values) or (
        all(type(v) is int for v in values) and -(2**63) <= min(values) and max(values) < 2**63
    ):
        return np.zeros(0, np.int64)
    inverse = np.unique(values, return_inverse=True)[1].reshape(-1).tolist()
    lost = set(unique_lost(values).tolist())
    owner = {entry: n for n, entry in enumerate(inverse) if n not in lost}
    for n, entry in enumerate(inverse):
        owner.setdefault(entry, n)
    return np.array([n for n, entry in enumerate(inverse) if owner[entry] != n], np.int64)


def csv_ids(values):
    """Integer ids when every id is an integer (sorted numerically), else strings."""
    if values and all(INTEGER.match(v) for v in values):
        numbers = [int(v) for v in values]
        if INT64[0] <= min(numbers) and max(numbers) <= INT64[1]:
            return np.array(numbers, np.int64)
    return np.array(values, dtype=object).astype(str)


def escaped(text):
    """``text`` with each lone surrogate (no UTF-8 text can hold one) as its escape
    ``\\udXXX``, as Python's ``backslashreplace`` writes it; other text unchanged."""
    if text.isascii() or not SURROGATE.search(text):
        return text
    return text.encode("utf-8", "backslashreplace").decode("utf-8")


def quoted(text):
    """``text`` JSON-quoted, non-ASCII as it is but a lone surrogate as its JSON escape
    (``json.loads`` gives ``text`` back: the quoting is injective)."""
    return escaped(json.dumps(text, ensure_ascii=False))


def number_text(value):
    """A JSON number id as text: an integer in decimal, any other float as Python's
    shortest round-trip ``repr`` (``2.5``, ``inf``)."""
    if isinstance(value, (int, np.integer)):
        return str(int(value))
    return repr(float(value))


def typed_key(value):
    """The typed key of one JSON id (an int, a non-whole float, a str or None)."""
    if value is None:
        return NULL + "null"
    return TEXT + value if type(value) is str else NUMBER + number_text(value)


def typed_keys(values):
    """Typed keys of a column of JSON ids (an int64 array or an object array)."""
    if isinstance(values, np.ndarray) and values.dtype.kind == "i":
        return np.array([NUMBER + str(v) for v in values.tolist()], dtype=object)
    return np.array([typed_key(v) for v in np.asarray(values, dtype=object).tolist()], object)


def key_value(key):
    """The JSON id of a typed key (what the file wrote, up to ``1.0`` -> ``1``)."""
    if key[0] == TEXT:
        return key[1:]
    if key[0] == NULL:
        return None
    text = key[1:]
    if INTEGER.match(text):
        return int(text)
    return FILE_NAN if text == "nan" else float(text)


def family_type(keys):
    """``"number"``, ``"text"`` or ``"json"`` (text some id of which numpy's text arrays
    would cut, a trailing U+0000, or no UTF-8 text can hold, a lone surrogate) for the
    typed keys of a family's defining ids, whose types are known to agree."""
    if not len(keys) or keys[0][0] == NUMBER:
        return "number"
    if any(k.endswith("\x00") for k in keys) or SURROGATE.search("".join(keys)):
        return "json"
    return "text"


def display(keys, id_type):
    """The ids of typed ``keys`` as ``GroundTruth`` keeps them (numpy text)."""
    if id_type == "json":
        return np.array([quoted(key_value(k)) for k in keys], str)
    if not len(keys):
        return np.zeros(0, str)
    return np.array([escaped(k[1:]) for k in keys], str)


def keys_of(ids, id_type):
    """Typed keys of ``GroundTruth`` ids of the given type (the inverse of ``display``;
    int64 ids of a split without a type are numbers)."""
    if id_type == "" and ids.dtype.kind == "i":
        return typed_keys(ids)
    if id_type == "number":
        return np.array([NUMBER + v for v in ids.tolist()], dtype=object)
    if id_type == "json":
        return np.array([TEXT + json.loads(v) for v in ids.tolist()], dtype=object)
    return np.array([TEXT + v for v in ids.tolist()], dtype=object)


def sort_order(keys, written=None):
    """Stable order of a family's typed keys as pycocotools' ``evaluate`` orders the ids
    (``np.unique(sorted(ids))``): numbers by value (Python's exact int/float
    comparison), text by code point.

    A NaN compares false with everything, so ``sorted`` leaves a list holding one
    partly unsorted. ``np.unique`` of a float64 array sorts it again, NaN last; of an
    object array (an id beyond 64 bits) it sorts with the same Python comparisons, so
    the order depends on the order the ids came in: ``written``, positions into
    ``keys`` in the order pycocotools' list holds them (image dict keys as first
    written; categories as listed, repeats and all), is replayed through pycocotools'
    own two lines (``nan_replayed_order``)."""
    values = [key_value(k) for k in keys.tolist()]
    if any(v is FILE_NAN for v in values):
        replayed = nan_replayed_order(values, range(len(values)) if written is None else written)
        if replayed is not None:
            return replayed
        return np.array(sorted(range(len(values)), key=lambda n: _nan_last(values[n])), np.int64)
    return np.array(sorted(range(len(values)), key=values.__getitem__), np.int64)


def _nan_last(value):
    return (value != value, value)


def object_array(values):
    """Whether numpy's type discovery makes ``values`` (JSON numbers) an object array:
    some integer beyond int64 and uint64 (``np.asarray([2**64, 1.0])`` is object)."""
    return any(type(v) is int and not -(2**63) <= v < 2**64 for v in values)


def nan_replayed_order(values, written):
    """The order of ``values`` (a family holding ``FILE_NAN``) pycocotools' ``evaluate``
    gives them when ``np.unique`` makes an object array: ``np.unique(sorted(...))`` run
    on the values as ``written`` lists them, each entry mapped back by identity (an
    object array holds the very objects). None when numpy makes a float64 array (then
    NaN is simply last)."""
    entries = nan_entries(values, written)
    if entries is None:
        return None
    order = list(dict.fromkeys(entries))
    seen = set(order)
    order += [n for n in range(len(values)) if n not in seen]
    return np.array(order, np.int64)


def nan_entries(values, written):
    """The positions (into ``values``) of the entries pycocotools' ``np.unique(sorted(
    ...))`` gives for ``values`` as ``written`` lists them, when numpy makes an object
    array (else None): a position may come twice, where the sort (disturbed by a NaN)
    leaves two equal ids apart or where a NaN is listed twice (NaN != NaN)."""
    if not object_array(values):
        return None
    at = {id(v): n for n, v in enumerate(values)}
    entries = np.unique(sorted(values[n] for n in written)).tolist()
    return [at[id(v)] for v in entries]


def shown(value):
    """A typed key as the user wrote the id (text quoted), for messages; anything else
    as it is."""
    if isinstance(value, str) and value[:1] in (NUMBER, TEXT, NULL):
        return repr(value[1:]) if value[0] == TEXT else value[1:]  # repr escapes surrogates
    return None


def _canonical_number(text):
    """CSV or file-name text of a number as a JSON number id is shown (``2.50`` ->
    ``2.5``, ``1e0`` -> ``1``); other text unchanged."""
    if INTEGER.match(text):
        return str(int(text))
    if not text.isascii() or "_" in text:  # float() reads "٣" and "1_0" as numbers
        return text
    try:
        value = float(text)
    except ValueError:
        return text
    if value != value:
        return text
    return str(int(value)) if value.is_integer() else repr(value)


def ids_like(values, known_ids, id_type=""):
    """Image ids read as text, typed like the split's ids so they can be looked up.

    With integer split ids, text that is not an integer becomes an id no image has,
    so the lookup reports it as not in the split. Against a split of JSON number ids
    that are not all 64-bit integers, numeric text is compared as the number it
    writes; against JSON-quoted text ids, text is quoted alike.
    """
    text = np.array(values, dtype=object).astype(str) if len(values) else np.zeros(0, str)
    if id_type == "number":
        return np.array([_canonical_number(v) for v in text.tolist()], str).reshape(-1)
    if id_type == "json":
        return np.array([quoted(v) for v in text.tolist()], str)
    if known_ids.dtype.kind != "i":
        return text
    converted = np.full(len(text), np.iinfo(np.int64).min, np.int64)
    ok = np.array([bool(INTEGER.match(v)) and INT64[0] <= int(v) <= INT64[1] for v in text], bool)
    converted[ok] = [int(v) for v in text[ok]]
    return converted
