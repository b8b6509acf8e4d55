"""Request parsers of the API."""

from rest_framework import parsers
from rest_framework.exceptions import ParseError


class JSONParser(parsers.JSONParser):
    """DRF's JSON parser. Python's decoder recurses, so a document nested deeper than
    the interpreter's recursion limit (``[[[[…`` 100,000 deep) raises RecursionError:
    that is malformed input like any other, a 400."""

    def parse(self, stream, media_type=None, parser_context=None):
        try:
            return super().parse(stream, media_type, parser_context)
        except RecursionError:
            raise ParseError("JSON parse error - nested too deeply") from None
