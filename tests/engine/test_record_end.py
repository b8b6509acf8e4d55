"""The first record's end found a chunk at a time (``json_syntax.RecordEnd``), and a
record longer than the slice limit refused without rescanning or decoding the buffer
whole at every chunk (``results_stream._first_mode``, ``_check_prefix``).

The end is checked against Python's ``json`` module (``JSONDecoder.raw_decode`` of the
first element, then the blanks after it: the comma or bracket that follows is the
element's end, RFC 8259 section 5) and against ``json_syntax.first_record_end`` on the
whole buffer, over random JSON arrays whose strings hold quotes, backslashes,
brackets, commas and ``},``, cut into random chunks.
"""

import json

import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from evaluation.engine import InputError, load_predictions, load_truth
from evaluation.engine.loaders import json_syntax, results_stream

_TEXT = st.text(alphabet=st.sampled_from(list('ab"\\{}[],: \n\u00e9')), max_size=8)
_VALUES = st.recursive(
    st.none() | st.booleans() | st.integers(-999, 999) | st.floats(allow_nan=False) | _TEXT,
    lambda inner: st.lists(inner, max_size=4) | st.dictionaries(_TEXT, inner, max_size=4),
    max_leaves=12,
)


def _python_json_end(text):
    """The offset of the comma or bracket after the first element (Python's json)."""
    decoder = json.JSONDecoder()
    start = len(text) - len(text[1:].lstrip()) if text[1:].lstrip() else 1
    _, end = decoder.raw_decode(text, start)
    while text[end] in " \t\n\r":
        end += 1
    return end


@settings(max_examples=300, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(
    st.lists(_VALUES, min_size=1, max_size=4),
    st.sampled_from([(",", ":"), (", ", ": "), (" ,\n ", " : ")]),
    st.lists(st.integers(1, 40), min_size=1, max_size=30),
    st.integers(1, 64),
)
def test_the_end_found_chunk_by_chunk_is_the_whole_buffers(records, separators, cuts, scan):
    text = json.dumps(records, separators=separators, ensure_ascii=False)
    data = text.encode()
    expected = len(text[: _python_json_end(text)].encode())  # bytes, as the reader's
    assert json_syntax.first_record_end(data) == expected
    scanner, buf, at = json_syntax.RecordEnd(), bytearray(), 0
    scanner.SCAN_BYTES = scan  # each new chunk is scanned in pieces of this size
    for size in cuts + [len(data)]:
        buf += data[at : at + size]
        at += size
        assert scanner.find(buf) == json_syntax.first_record_end(buf)
    assert scanner.find(buf) == expected


_HEAD = '{"image_id": 1, "category_id": 1, "bbox": [1, 2, 3, 4], "score": 0.5},\n'
_LONG = {
    "numbers": ('{"image_id": 1, "category_id": 1, "score": 0.5, "bbox": [', "1.5,"),
    "string": ('{"category_id": 1, "score": 0.5, "image_id": "', 'x,]\\\\\\"'),
    # "}," inside the string: each chunk a cut is tried there and fails at its end
    "string with cuts": ('{"category_id": 1, "score": 0.5, "image_id": "', "x,},\\\\"),
}


@pytest.mark.parametrize("shape", sorted(_LONG))
@pytest.mark.parametrize("record", [0, 1])
def test_a_long_record_is_scanned_once_and_never_decoded_whole(
    tmp_path, monkeypatch, shape, record
):
    """A record longer than ``MAX_SLICE_BYTES`` is refused naming it; meanwhile every
    byte is scanned for its structure once (not the buffer again at every chunk), and
    no slice without a record end is decoded into records. A string holding "},"
    (where a cut is tried and fails inside the string) stops at the limit too: before,
    it was buffered to the end of the file."""
    monkeypatch.setattr(results_stream, "CHUNK_BYTES", 1024)
    monkeypatch.setattr(results_stream, "MAX_SLICE_BYTES", 32 * 1024)
    head, unit = _LONG[shape]
    path = tmp_path / "long.json"
    path.write_text("[" + _HEAD * record + head + unit * 20_000 + "1]}]")
    truth_path = tmp_path / "truth.json"
    truth_path.write_text(
        json.dumps(
            {
                "images": [{"id": 1, "width": 9, "height": 9}],
                "annotations": [],
                "categories": [{"id": 1, "name": "a"}],
            }
        )
    )
    truth = load_truth(truth_path)
    scanned, decoded = [], []
    structure, decode = json_syntax._structure, results_stream._decode_slice
    monkeypatch.setattr(
        json_syntax,
        "_structure",
        lambda chunk, *a: scanned.append(len(chunk)) or structure(chunk, *a),
    )
    monkeypatch.setattr(
        results_stream, "_decode_slice", lambda p, *a: decoded.append(len(p)) or decode(p, *a)
    )
    with pytest.raises(InputError, match=rf"long\.json: record {record}: no record ends within"):
        load_predictions(path, truth)
    assert sum(scanned) <= 32 * 1024 + 2 * 1024
    if shape != "string with cuts":
        assert all(n <= len(_HEAD) + 1 for n in decoded)  # the whole first record only
