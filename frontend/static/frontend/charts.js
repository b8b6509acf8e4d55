/* Benchbook charts: read JSON embedded by the page, draw with Chart.js.
   Every chart is kept in window.benchbookCharts[id] so tests can inspect it. */
(function () {
  "use strict";
  // Okabe–Ito palette: distinguishable with the common colour-vision deficiencies.
  const PALETTE = ["#0072B2", "#E69F00", "#009E73", "#D55E00", "#CC79A7", "#56B4E9", "#000000", "#F0E442"];
  const DASHES = [[], [6, 3], [2, 2], [8, 3, 2, 3]];
  window.benchbookCharts = window.benchbookCharts || {};

  function data(id) { return JSON.parse(document.getElementById(id).textContent); }
  function axis(title, extra) { return Object.assign({ title: { display: true, text: title } }, extra || {}); }

  // Vertical marks where a joined split line moves to another revision (dashed) and
  // where a line's box policy changes (dotted): the numbers either side of a mark are
  // not computed alike.
  const revisionMarks = {
    id: "revisionMarks",
    afterDatasetsDraw(chart, args, options) {
      const { ctx, chartArea, scales } = chart;
      const marks = (options.changes || []).map(c => [c, [4, 3], `${c.series} rev ${c.to}`])
        .concat((options.policyChanges || []).map(c => [c, [1, 2], `${c.series}: boxes ${c.to}`]));
      marks.forEach(([change, dash, text], k) => {
        const x = scales.x.getPixelForValue(change.index - 0.5);
        ctx.save();
        ctx.strokeStyle = "#444"; ctx.fillStyle = "#222"; ctx.lineWidth = 1; ctx.setLineDash(dash);
        ctx.beginPath(); ctx.moveTo(x, chartArea.top); ctx.lineTo(x, chartArea.bottom); ctx.stroke();
        ctx.setLineDash([]); ctx.font = "11px sans-serif";
        const width = ctx.measureText(text).width;
        ctx.fillText(text, Math.min(x + 3, chartArea.right - width), chartArea.top + 12 + 13 * k);
        ctx.restore();
      });
    },
  };

  function history(canvas) {
    // The page embeds one series (metric x class x revision view); another selection
    // is fetched from the history API, one metric and class at a time.
    let d = data(canvas.dataset.source);
    const metric = document.getElementById(canvas.dataset.metric);
    const cls = document.getElementById(canvas.dataset.class);
    const revisions = document.getElementById(canvas.dataset.revisions);
    const status = document.getElementById("history-status");
    function datasets() {
      return d.series.map((line, i) => ({
        label: line.name,
        data: line.values,
        revisions: line.revisions,
        boxPolicies: line.box_policies || [],
        engines: line.engine_versions || [],
        borderColor: PALETTE[i % PALETTE.length], backgroundColor: PALETTE[i % PALETTE.length],
        borderDash: DASHES[i % DASHES.length], spanGaps: true, tension: 0,
        // The baseline is drawn as a large diamond on every line.
        pointRadius: d.versions.map(v => (v.id === d.baseline ? 9 : 4)),
        pointStyle: d.versions.map(v => (v.id === d.baseline ? "rectRot" : "circle")),
      }));
    }
    const title = () =>
      `${d.metric}${d.level ? ` at ${d.level}` : ""} (${d.protocol}, 0–1${d.lower_is_better ? ", lower is better" : ""})`;
    // The metric selector's level choices are "metric@level": the API takes them apart.
    const chosen = () => {
      const [m, level] = metric.value.split("@");
      const query = { metric: m, class: cls.value, revisions: revisions.value };
      if (level) query.level = level;
      return new URLSearchParams(query);
    };
    const versionUrl = id => canvas.dataset.versionUrl.replace("/0/", `/${id}/`);
    const chart = new Chart(canvas, {
      type: "line",
      data: { labels: d.versions.map(v => v.label), datasets: datasets() },
      plugins: [revisionMarks],
      options: {
        responsive: true, maintainAspectRatio: false, animation: false,
        scales: {
          x: axis("Version (oldest to newest)"),
          y: axis(title(), { min: 0, max: 1 }),
        },
        onClick: (event, elements) => {
          if (elements.length) window.location = versionUrl(d.versions[elements[0].index].id);
        },
        plugins: {
          legend: { position: "bottom" },
          revisionMarks: { changes: d.changes, policyChanges: d.policy_changes },
          tooltip: {
            callbacks: {
              label: item => {
                const at = item.dataIndex;
                const rev = item.dataset.revisions[at];
                const boxes = item.dataset.boxPolicies[at], engine = item.dataset.engines[at];
                const how = [rev ? `rev ${rev}` : "", boxes ? `boxes ${boxes}` : "", engine ? `engine ${engine}` : ""]
                  .filter(Boolean).join(", ");
                return `${item.dataset.label}: ${item.formattedValue}${how ? ` (${how})` : ""}`;
              },
            },
          },
        },
      },
    });
    const tableShows = `${d.class === "mean" ? "mean " : `${d.class} `}${d.metric}${d.level ? ` at ${d.level}` : ""}`;
    const tableShown = { metric: d.metric, class: d.class, revisions: d.view };
    if (d.level) tableShown.level = d.level;
    const tableQuery = new URLSearchParams(tableShown).toString();
    function refresh() {
      const query = chosen();
      status.textContent = "Loading…";
      fetch(`${canvas.dataset.url}?${query}`, { headers: { Accept: "application/json" } })
        .then(r => { if (!r.ok) throw new Error(`HTTP ${r.status}`); return r.json(); })
        .then(next => {
          d = next;
          chart.data.labels = d.versions.map(v => v.label);
          chart.data.datasets = datasets();
          chart.options.scales.y.title.text = title();
          chart.options.plugins.revisionMarks.changes = d.changes;
          chart.options.plugins.revisionMarks.policyChanges = d.policy_changes;
          chart.update();
          window.history.replaceState(null, "", `?${query}`);
          status.textContent = "";
          if (query.toString() === tableQuery) return; // the table shows this selection
          status.textContent = `The table below shows ${tableShows}. `;
          const link = document.createElement("a");
          link.href = `?${query}`;
          link.textContent = "Show this selection in the table";
          status.append(link);
        })
        .catch(error => { status.textContent = `Could not load that series (${error.message}); try again.`; });
    }
    [metric, cls, revisions].forEach(select => select.addEventListener("change", refresh));
    window.benchbookCharts[canvas.id] = chart;
  }

  function curves(canvas) {
    // {series: [name...], classes: {class: {series name: {recall: [], precision: []}}}}
    const d = data(canvas.dataset.source);
    const cls = document.getElementById(canvas.dataset.class);
    function datasets() {
      const entry = d.classes[cls.value] || {};
      return d.series.map((name, i) => ({
        label: name,
        data: (entry[name] ? entry[name].recall : []).map((r, j) => ({ x: r, y: entry[name].precision[j] })),
        borderColor: PALETTE[i % PALETTE.length], backgroundColor: PALETTE[i % PALETTE.length],
        borderDash: DASHES[i % DASHES.length], pointRadius: 0, showLine: true, stepped: "after",
      }));
    }
    const chart = new Chart(canvas, {
      type: "scatter",
      data: { datasets: datasets() },
      options: {
        responsive: true, maintainAspectRatio: false, animation: false,
        scales: { x: axis("Recall (0–1)", { min: 0, max: 1 }), y: axis("Interpolated precision (0–1)", { min: 0, max: 1 }) },
        plugins: { legend: { position: "bottom" } },
      },
    });
    cls.addEventListener("change", () => { chart.data.datasets = datasets(); chart.update(); });
    window.benchbookCharts[canvas.id] = chart;
  }

  const DECADES = [1e-5, 1e-4, 1e-3, 1e-2, 1e-1, 1, 10, 100, 1000];
  const MISS_TICKS = [0.01, 0.02, 0.05, 0.1, 0.2, 0.3, 0.4, 0.5, 0.64, 0.8, 1];
  function ticks(scale, values) {
    return values.filter(v => v >= scale.min * 0.999 && v <= scale.max * 1.001).map(v => ({ value: v }));
  }
  function label(value) { return String(+Number(value).toPrecision(2)); }

  function missRate(canvas) {
    // Miss rate against false positives per image, both axes logarithmic (as the
    // pedestrian toolbox plots it). {series, setups, classes, curves: {setup: {class:
    // {series: {fppi, miss_rate, lamr}}}}}; a stored curve holds, per distinct FPPI,
    // the lowest miss rate reached there. FPPI 0 is drawn on the left edge and a miss
    // rate of 0 on the bottom edge (a log axis has no 0).
    const d = data(canvas.dataset.source);
    const setup = document.getElementById(canvas.dataset.setup);
    const cls = document.getElementById(canvas.dataset.class);
    function entry() { return (d.curves[setup.value] || {})[cls.value] || {}; }
    function bounds() {
      let x = 1e-2, y = 5e-2;
      Object.values(entry()).forEach(c => {
        c.fppi.forEach(v => { if (v > 0) x = Math.min(x, v); });
        c.miss_rate.forEach(v => { if (v > 0) y = Math.min(y, v); });
      });
      return { x: x / 2, y: y / 2 };
    }
    function datasets(low) {
      const e = entry();
      return d.series.map((name, i) => {
        const c = e[name] || { fppi: [], miss_rate: [], lamr: null };
        const lamr = c.lamr === null || c.lamr === undefined ? "—" : c.lamr.toFixed(3);
        return {
          label: `${name}: log-average miss rate ${lamr}`,
          data: c.fppi.map((x, j) => ({ x: Math.max(x, low.x), y: Math.max(c.miss_rate[j], low.y) })),
          borderColor: PALETTE[i % PALETTE.length], backgroundColor: PALETTE[i % PALETTE.length],
          borderDash: DASHES[i % DASHES.length], pointRadius: 0, showLine: true, stepped: "after",
        };
      });
    }
    const low = bounds();
    const chart = new Chart(canvas, {
      type: "scatter",
      data: { datasets: datasets(low) },
      options: {
        responsive: true, maintainAspectRatio: false, animation: false,
        scales: {
          // Decades on x; on y the toolbox's own ticks (.05, .1 … .5, .64, .8, 1).
          x: axis("False positives per image (log)", {
            type: "logarithmic", min: low.x,
            afterBuildTicks: scale => { scale.ticks = ticks(scale, DECADES); },
            ticks: { callback: label, autoSkip: false, maxRotation: 0 },
          }),
          y: axis("Miss rate (log, 0–1)", {
            type: "logarithmic", min: low.y, max: 1,
            afterBuildTicks: scale => { scale.ticks = ticks(scale, MISS_TICKS); },
            ticks: { callback: label, autoSkip: false },
          }),
        },
        plugins: { legend: { position: "bottom" } },
      },
    });
    function refresh() {
      const b = bounds();
      chart.data.datasets = datasets(b);
      chart.options.scales.x.min = b.x;
      chart.options.scales.y.min = b.y;
      chart.update();
    }
    setup.addEventListener("change", refresh);
    cls.addEventListener("change", refresh);
    window.benchbookCharts[canvas.id] = chart;
  }

  // Live status of queued and running evaluations: each bar polls its evaluation; a
  // failure shows its message at once; when every evaluation on the page has finished
  // and one was scored, the page loads again to show the numbers.
  function progress() {
    const bars = [...document.querySelectorAll("[data-poll]")];
    let open = bars.length, scored = 0;
    const finished = state => {
      open -= 1;
      if (state === "done") scored += 1;
      if (open === 0 && scored > 0) setTimeout(() => window.location.reload(), 1500);
    };
    bars.forEach(bar => {
      const tick = () => fetch(bar.dataset.poll, { headers: { Accept: "application/json" } })
        .then(r => { if (!r.ok) throw new Error(`HTTP ${r.status}`); return r.json(); })
        .then(s => {
          bar.value = s.progress;
          bar.textContent = `${s.progress} %`;
          const label = document.getElementById(bar.dataset.state);
          if (label) {
            label.textContent = s.state;
            label.className = `state state-${s.state}`;
          }
          if (s.state === "queued" || s.state === "running") {
            setTimeout(tick, 1000);
            return;
          }
          if (s.state === "failed") {
            const error = document.createElement("div");
            error.className = "error";
            error.setAttribute("role", "alert");
            error.textContent = s.error || "scoring failed";
            bar.replaceWith(error);
          }
          finished(s.state);
        })
        .catch(() => setTimeout(tick, 5000)); // server unreachable for a moment: try again
      tick();
    });
  }

  document.addEventListener("DOMContentLoaded", () => {
    document.querySelectorAll("canvas[data-chart=history]").forEach(history);
    document.querySelectorAll("canvas[data-chart=curves]").forEach(curves);
    document.querySelectorAll("canvas[data-chart=missrate]").forEach(missRate);
    progress();
  });
})();
