"""What the client prints: a progress bar on stderr, tables on stdout."""

import sys

CAUTION = (
    "Benchmark metrics support, and do not replace, the safety validation of a perception "
    "system under the applicable standards (for example ISO 26262, ISO 21448, UL 4600) and "
    "your organisation's release process."
)


class Progress:
    """One line redrawn in place on a terminal; in a CI log, a line per 10 % step."""

    def __init__(self, stream=None, width=30):
        self.stream = stream or sys.stderr
        self.width = width
        self.tty = self.stream.isatty()
        self.last_step = -1

    def show(self, fraction, text):
        fraction = max(0.0, min(1.0, fraction))
        filled = round(self.width * fraction)
        line = f"[{'#' * filled}{'.' * (self.width - filled)}] {100 * fraction:3.0f}% {text}"
        if self.tty:
            self.stream.write("\r" + line.ljust(100)[:100])
            self.stream.flush()
        elif int(fraction * 10) != self.last_step:
            self.last_step = int(fraction * 10)
            self.stream.write(line + "\n")
            self.stream.flush()

    def done(self):
        if self.tty:
            self.stream.write("\n")
            self.stream.flush()
        self.last_step = -1


def number(value, signed=False):
    if value is None:
        return "—"
    return f"{value:+.3f}" if signed else f"{value:.3f}"


def table(headers, rows):
    """Plain aligned columns (numbers right-aligned)."""
    cells = [[str(c) for c in headers]] + [[str(c) for c in row] for row in rows]
    widths = [max(len(row[i]) for row in cells) for i in range(len(headers))]

    def line(row):
        out = []
        for i, cell in enumerate(row):
            numeric = cell.replace(".", "").replace("-", "").replace("+", "").isdigit()
            out.append(cell.rjust(widths[i]) if numeric or cell == "—" else cell.ljust(widths[i]))
        return "  ".join(out).rstrip()

    rule = "  ".join("-" * w for w in widths)
    return "\n".join([line(cells[0]), rule, *(line(row) for row in cells[1:])])


SUMMARY_KEYS = ("AP", "AP50", "AP75", "APs", "APm", "APl", "AR100", "recall")


def summary_table(results):
    keys = [k for k in SUMMARY_KEYS if any(k in s.get("summary", {}) for s in results["splits"])]
    rows = []
    for entry in results["splits"]:
        if not entry["scored"]:
            rows.append([entry["split_name"], "not scored", *["—"] * len(keys)])
            continue
        rows.append(
            [
                entry["split_name"],
                entry["protocol"],
                *(number(entry["summary"].get(k)) for k in keys),
            ]
        )
    return table(["split", "protocol", *keys], rows)


def provenance_lines(results):
    """Per scored split, one line per protocol saying how its numbers were computed:
    protocol version, box policy, engine version (``/results/``' stored record; a
    server that does not give them prints nothing)."""
    lines = []
    for entry in results["splits"]:
        if not entry["scored"] or "box_policy" not in entry:
            continue
        shown = [(entry["protocol"], entry)]
        shown += sorted(entry.get("other_protocols_provenance", {}).items())
        for protocol, p in shown:
            lines.append(
                f"{entry['split_name']}: {protocol} v{p['protocol_version']}, "
                f"boxes {p['box_policy'] or '—'}, engine {p['engine_version']}"
                + "".join(f"; {key}: {why}" for key, why in p.get("not_recorded", {}).items())
            )
    return lines


def outcomes_table(outcomes):
    order = {"fail": 0, "missing": 0, "not significant": 1, "no data": 2, "pass": 3}
    rows = [
        [o["rule_number"], o["split_name"], o["class_name"], o["status"], o["detail"]]
        for o in sorted(outcomes, key=lambda o: (order.get(o["status"], 9), o["rule_number"]))
    ]
    return table(["rule", "split", "class", "outcome", "evidence"], rows)


def compare_table(comparison):
    blocks = []
    for entry in comparison["splits"]:
        rows = []
        for d in entry["deltas"]:
            interval = d.get("interval")
            shown = (
                f"[{number(interval[0], True)}, {number(interval[1], True)}]" if interval else ""
            )
            rows.append(
                [
                    d["class"],
                    number(d["reference"]),
                    number(d["candidate"]),
                    number(d["delta"], True),
                    shown,
                ]
            )
        blocks.append(
            f"{entry['split_name']} ({comparison['protocol']} AP)\n"
            + table(
                [
                    "class",
                    comparison["reference"]["label"],
                    comparison["candidate"]["label"],
                    "delta",
                    "interval",
                ],
                rows,
            )
        )
        blocks += _slice_deltas(entry, comparison["protocol"])
    return "\n\n".join(blocks) or "The two versions share no scored split."


def _slice_deltas(entry, protocol):
    """Mean deltas (candidate - reference) per size bucket, and per level or setup of
    each level protocol (a rise of a lower-is-better miss rate is a loss)."""
    blocks = []
    sizes = [
        [row["size"], number(row["cells"][0]["delta"], True)] for row in entry.get("sizes", [])
    ]
    if sizes:
        blocks.append(
            f"{entry['split_name']} by size ({protocol} AP, mean)\n"
            + table(["size", "delta"], sizes)
        )
    for level_table in entry.get("levels", []):
        direction = "lower is better" if level_table["lower_is_better"] else "higher is better"
        rows = [
            [row["class"], *(number(c["delta"], True) for c in row["cells"])]
            for row in level_table["rows"]
        ]
        blocks.append(
            f"{entry['split_name']} by level ({level_table['protocol']} "
            f"{level_table['value_key']}, {direction})\n"
            + table(["class", *level_table["levels"]], rows)
        )
    return blocks
