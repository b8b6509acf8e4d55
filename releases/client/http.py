"""The HTTP side: JSON requests, streamed multipart uploads, errors with exit codes."""

import json
import mimetypes
import os
import secrets
import time
import urllib.error
import urllib.parse
import urllib.request

from . import BAD_INPUT, FAILURE


class ClientError(Exception):
    """A failure to report; ``exit_code`` says what kind (bad input or other)."""

    def __init__(self, message, exit_code=FAILURE):
        super().__init__(message)
        self.exit_code = exit_code


def _server_message(status, raw):
    """The server's error body (``message`` and per-field ``errors``) as one text."""
    try:
        body = json.loads(raw)
    except ValueError:
        return f"HTTP {status}: {raw[:300].decode(errors='replace').strip()}"
    if not isinstance(body, dict) or "message" not in body:
        return f"HTTP {status}: {body}"
    lines = [f"HTTP {status}: {body['message']}"]
    for error in body.get("errors", [])[1:]:
        lines.append(f"  {error.get('path') or '-'}: {error.get('message')}")
    located = [f"{k} {body[k]}" for k in ("file", "record", "field") if body.get(k)]
    if located:
        lines.append("  in " + ", ".join(located))
    return "\n".join(lines)


class MultipartBody:
    """A multipart/form-data body that streams its file in blocks, with a known
    length (so no chunked encoding is needed) and a callback per block sent."""

    BLOCK = 1 << 20

    def __init__(self, fields, file_field, path, on_progress=None):
        self.boundary = "benchbook-" + secrets.token_hex(12)
        self.path = path
        self.on_progress = on_progress or (lambda sent, total: None)
        head = b""
        for name, value in fields.items():
            head += (
                f"--{self.boundary}\r\nContent-Disposition: form-data; "
                f'name="{name}"\r\n\r\n{value}\r\n'
            ).encode()
        file_name = os.path.basename(path).replace('"', "")
        kind = mimetypes.guess_type(file_name)[0] or "application/octet-stream"
        head += (
            f'--{self.boundary}\r\nContent-Disposition: form-data; name="{file_field}"; '
            f'filename="{file_name}"\r\nContent-Type: {kind}\r\n\r\n'
        ).encode()
        self.head = head
        self.tail = f"\r\n--{self.boundary}--\r\n".encode()
        self.file_size = os.path.getsize(path)
        self.length = len(self.head) + self.file_size + len(self.tail)

    @property
    def content_type(self):
        return f"multipart/form-data; boundary={self.boundary}"

    def __iter__(self):
        yield self.head
        sent = 0
        with open(self.path, "rb") as f:
            while block := f.read(self.BLOCK):
                sent += len(block)
                self.on_progress(sent, self.file_size)
                yield block
        yield self.tail


class Api:
    """Calls to ``{url}/api/v1/`` with a bearer token."""

    def __init__(self, url, token, timeout=60, retries=3):
        self.site = url.rstrip("/")
        self.base = self.site + "/api/v1/"
        self.token = token
        self.timeout = timeout
        self.retries = retries

    def _send(self, method, path, *, data=None, headers=None, query=None):
        url = path if path.startswith("http") else self.base + path.lstrip("/")
        if query:
            url += "?" + urllib.parse.urlencode({k: v for k, v in query.items() if v is not None})
        request = urllib.request.Request(url, data=data, method=method)
        request.add_header("Authorization", f"Bearer {self.token}")
        headers = {"Accept": "application/json", **(headers or {})}
        for key, value in headers.items():
            request.add_header(key, value)
        try:
            with urllib.request.urlopen(request, timeout=self.timeout) as response:
                return response.status, response.read(), response.headers
        except urllib.error.HTTPError as e:
            raw = e.read()
            if 400 <= e.code < 500 and e.code not in (408, 429):
                raise ClientError(_server_message(e.code, raw), BAD_INPUT) from None
            raise _Retryable(_server_message(e.code, raw), e.headers.get("Retry-After")) from None
        except (urllib.error.URLError, TimeoutError, ConnectionError) as e:
            reason = getattr(e, "reason", e)
            raise _Retryable(f"cannot reach {url}: {reason}") from None

    def _with_retries(self, method, path, **kwargs):
        for attempt in range(self.retries + 1):
            try:
                return self._send(method, path, **kwargs)
            except _Retryable as e:
                if attempt == self.retries:
                    raise ClientError(str(e), FAILURE) from None
                time.sleep(min(_seconds(e.retry_after, 2.0 * 2**attempt), 60.0))

    def get(self, path, **query):
        _, raw, _ = self._with_retries("GET", path, query=query)
        return json.loads(raw)

    def get_text(self, path, **query):
        """A document in whatever type ``?format=`` asks for (JSON or HTML)."""
        _, raw, _ = self._with_retries("GET", path, query=query, headers={"Accept": "*/*"})
        return raw.decode()

    def get_all(self, path, **query):
        """Every item of a paginated list."""
        page = self.get(path, page_size=500, **query)
        items = list(page["results"])
        while page.get("next"):
            page = self.get(page["next"])
            items += page["results"]
        return items

    def post_json(self, path, payload):
        _, raw, _ = self._send(
            "POST",
            path,
            data=json.dumps(payload).encode(),
            headers={"Content-Type": "application/json"},
        )
        return json.loads(raw)

    def upload(self, path, fields, file_field, file_path, on_progress=None):
        """POST a file, streamed. Uploading the same bytes again is harmless (the
        server stores a file once), so a dropped connection is retried."""
        for attempt in range(self.retries + 1):
            body = MultipartBody(fields, file_field, file_path, on_progress)
            try:
                _, raw, _ = self._send(
                    "POST",
                    path,
                    data=iter(body),
                    headers={"Content-Type": body.content_type, "Content-Length": body.length},
                )
                return json.loads(raw)
            except _Retryable as e:
                if attempt == self.retries:
                    raise ClientError(str(e), FAILURE) from None
                time.sleep(2.0 * 2**attempt)


class _Retryable(Exception):
    def __init__(self, message, retry_after=None):
        super().__init__(message)
        self.retry_after = retry_after


def _seconds(retry_after, default):
    try:
        return float(retry_after)
    except (TypeError, ValueError):
        return default
