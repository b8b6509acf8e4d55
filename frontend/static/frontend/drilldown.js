// Image drill-down: ground truth and each version's detections drawn as SVG over the
// image (or an empty frame of its size), coloured by outcome at the chosen score
// threshold. Data: the JSON in #drilldown-data (releases.selectors.cause.image_drilldown).
(function () {
  "use strict";
  const source = document.getElementById("drilldown-data");
  if (!source) return;
  const data = JSON.parse(source.textContent);
  const SVG = "http://www.w3.org/2000/svg";
  // Okabe–Ito colours; outcomes also differ by dash pattern, so colour is not needed.
  const STYLE = {
    tp: { colour: "#009E73", dash: "" },
    fp: { colour: "#D55E00", dash: "6 3" },
    ignored: { colour: "#999999", dash: "2 3" },
    over_cap: { colour: "#999999", dash: "2 3" },
    truth: { colour: "#0072B2", dash: "" },
    missed: { colour: "#E69F00", dash: "" },
  };
  const slider = document.getElementById("threshold");
  const readout = document.getElementById("threshold-value");
  const toggles = Array.from(document.querySelectorAll("[data-class-toggle]"));
  const hover = document.getElementById("hover-label");
  const state = { threshold: parseFloat(slider.value), hidden: new Set() };
  for (const box of toggles) {
    if (!box.checked) state.hidden.add(parseInt(box.dataset.classToggle, 10));
  }
  const labelSize = Math.max(data.image.width, data.image.height) / 60;
  window.benchbookDrilldown = { data: data, state: state, counts: {} };

  function el(name, attrs, parent) {
    const node = document.createElementNS(SVG, name);
    for (const [k, v] of Object.entries(attrs)) node.setAttribute(k, v);
    if (parent) parent.appendChild(node);
    return node;
  }

  function outcomeAt(d, threshold) {
    if (d.score < threshold) return null; // below the cut: not shown
    if (d.outcome === "fp" || d.outcome.startsWith("fp_")) return "fp";
    return d.outcome;
  }

  function truthState(t, side, threshold) {
    if (t.ignored) return "ignored";
    const score = t.found[side];
    return score !== null && score !== undefined && score >= threshold ? "found" : "missed";
  }

  function rect(g, box, style, width, label) {
    const r = el("rect", {
      x: box[0], y: box[1], width: Math.max(box[2], 0.5), height: Math.max(box[3], 0.5),
      fill: "transparent", stroke: style.colour, "stroke-width": width,
      "stroke-dasharray": style.dash, "vector-effect": "non-scaling-stroke",
    }, g);
    el("title", {}, r).textContent = label;
    r.addEventListener("mouseenter", function () { hover.textContent = label; });
    r.addEventListener("focus", function () { hover.textContent = label; });
    r.setAttribute("tabindex", "0");
    return r;
  }

  function draw(side) {
    const svg = document.getElementById("frame-" + side);
    if (!svg || !data[side]) return;
    const g = svg.querySelector("g.boxes");
    while (g.firstChild) g.removeChild(g.firstChild);
    const other = side === "candidate" ? "reference" : "candidate";
    const counts = { tp: 0, fp: 0, missed: 0, lost: 0, shown: 0 };
    const t = state.threshold;
    const area = (b) => -b.box[2] * b.box[3]; // larger first: a small box stays pointable
    for (const box of data.truth.slice().sort((a, b) => area(a) - area(b))) {
      if (state.hidden.has(box.class)) continue;
      const s = truthState(box, side, t);
      const lost = s === "missed" && data[other] && truthState(box, other, t) === "found";
      if (s === "missed") counts.missed += 1;
      if (lost && side === "candidate") counts.lost += 1;
      const style = s === "missed" ? STYLE.missed : s === "ignored" ? STYLE.ignored : STYLE.truth;
      const why = box.reason[side];
      const words = data.classes[box.class] + " (ground truth): " +
        (s === "found" ? "found, score " + box.found[side].toFixed(3)
          : s === "missed" && why === "matched" ? "missed at this threshold (found at score " + box.found[side].toFixed(3) + ")"
          : why.replace(/_/g, " ")) +
        (lost ? " — " + data[other].label + " found it" : "");
      const r = rect(g, box.box, style, s === "missed" ? 3 : 1.5, words);
      r.setAttribute("class", "gt gt-" + s + (lost ? " gt-lost" : ""));
      r.dataset.truth = box.index;
    }
    for (const d of data[side].detections.slice().sort((a, b) => area(a) - area(b))) {
      if (state.hidden.has(d.class)) continue;
      const o = outcomeAt(d, t);
      if (o === null) continue;
      counts.shown += 1;
      if (o === "tp") counts.tp += 1;
      if (o === "fp") counts.fp += 1;
      const words = data.classes[d.class] + " " + d.score.toFixed(3) + ": " +
        d.outcome.replace(/_/g, " ") + (d.iou !== null ? ", IoU " + d.iou.toFixed(2) : "");
      const r = rect(g, d.box, STYLE[o] || STYLE.fp, 2, words);
      r.setAttribute("class", "det det-" + o);
      if (d.iou !== null) {
        const tag = el("text", {
          x: d.box[0] + 2, y: d.box[1] + d.box[3] - 3, class: "iou-label", "font-size": labelSize,
          fill: (STYLE[o] || STYLE.fp).colour,
        }, g);
        tag.textContent = d.iou.toFixed(2);
      }
    }
    window.benchbookDrilldown.counts[side] = counts;
    const summary = document.getElementById("counts-" + side);
    if (summary) {
      summary.textContent = counts.tp + " true, " + counts.fp + " false positives, " +
        counts.missed + " missed" + (side === "candidate" && data.reference ?
          " (" + counts.lost + " that " + data.reference.label + " found)" : "") +
        " at score ≥ " + t.toFixed(2);
    }
  }

  // A box's state in words, with the score of the detection that matched it (the
  // records' box row names that detection; its own row has the score).
  const MISSED_WHY = {
    missed_localisation: "nearest detection of its class off",
    missed_class: "a detection of another class on it",
  };

  function stateWords(box, side, state) {
    const score = box.found[side];
    if (score !== null && score !== undefined) {
      if (state === "found") return "found (score " + score.toFixed(2) + ")";
      return state + " (matched at score " + score.toFixed(2) + ", under the threshold)";
    }
    const near = box.near && box.near[side];
    const why = MISSED_WHY[box.reason && box.reason[side]];
    if (state !== "missed" || !why || !near) return state;
    return state + " (" + why + ": IoU " + (near.iou === null ? "—" : near.iou.toFixed(2)) +
      ", score " + near.score.toFixed(2) + ")";
  }

  function lostRows() {
    const body = document.getElementById("lost-rows");
    if (!body) return;
    while (body.firstChild) body.removeChild(body.firstChild);
    let n = 0;
    for (const box of data.truth) {
      if (state.hidden.has(box.class) || !data.reference) continue;
      const c = truthState(box, "candidate", state.threshold);
      const r = truthState(box, "reference", state.threshold);
      if (c === r) continue;
      n += 1;
      const tr = document.createElement("tr");
      const cells = [
        box.id, data.classes[box.class], box.box.map((v) => v.toFixed(0)).join(", "),
        stateWords(box, "candidate", c), stateWords(box, "reference", r),
      ];
      const labels = [null, null, null, data.candidate.label, data.reference.label];
      for (const [i, text] of cells.entries()) {
        const td = document.createElement("td");
        td.textContent = text;
        if (labels[i]) td.dataset.label = labels[i];  // named at phone width (CSS)
        tr.appendChild(td);
      }
      body.appendChild(tr);
    }
    document.getElementById("lost-none").hidden = n > 0;
  }

  function redraw() {
    readout.textContent = state.threshold.toFixed(2);
    draw("candidate");
    draw("reference");
    lostRows();
  }

  slider.addEventListener("input", function () {
    state.threshold = parseFloat(slider.value);
    redraw();
  });
  for (const box of toggles) {
    box.addEventListener("change", function () {
      const k = parseInt(box.dataset.classToggle, 10);
      if (box.checked) state.hidden.delete(k); else state.hidden.add(k);
      redraw();
    });
  }
  document.addEventListener("keydown", function (event) {
    const target = event.target;
    if (target && (target.tagName === "INPUT" || target.tagName === "SELECT" || target.tagName === "TEXTAREA")) {
      if (target.type !== "checkbox") return;
    }
    const link = event.key === "ArrowRight" || event.key === "j" ? document.getElementById("next-image")
      : event.key === "ArrowLeft" || event.key === "k" ? document.getElementById("previous-image") : null;
    if (link && link.href) {
      event.preventDefault();
      window.location.href = link.href;
    }
  });
  redraw();
})();
