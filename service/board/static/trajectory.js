// Draws a Flag's trajectory with Chart.js (vendored): one panel per analyte, all on the same time
// axis, with the policy's dangerous levels as bands, insulin therapy as shaded columns, the Flag's
// evidence and suspect results as distinct marker shapes, and the change the Flag is about as a line.
(function () {
  "use strict";
  var source = document.getElementById("chart-data");
  if (!source || typeof Chart === "undefined") { return; }
  var data = JSON.parse(source.textContent);
  var zone = data.zone || "UTC";
  var format = new Intl.DateTimeFormat("en-GB", { timeZone: zone, day: "2-digit", month: "short", hour: "2-digit", minute: "2-digit" });
  var INK = "#1c2430", MEASURED = "#0b4f8a", CORRECTED = "#6a3d9a", DANGER = "rgba(164, 22, 26, 0.13)",
      INSULIN = "rgba(47, 93, 138, 0.12)", SUSPECT = "#a4161a";

  document.querySelectorAll("td.t[data-ms]").forEach(function (cell) {
    cell.textContent = format.format(new Date(Number(cell.getAttribute("data-ms"))));
  });

  // Ticks on the hour, every 6 h of the lab's clock, so every panel reads the same times.
  var SIX_HOURS = 6 * 3600 * 1000;
  function roundTicks(scale) {
    var offset = zoneOffset(data.window.start);
    var first = Math.ceil((data.window.start + offset) / SIX_HOURS) * SIX_HOURS - offset;
    var ticks = [];
    for (var t = first; t <= data.window.end; t += SIX_HOURS) { ticks.push({ value: t }); }
    scale.ticks = ticks;
  }
  function zoneOffset(ms) {
    var parts = new Intl.DateTimeFormat("en-US", { timeZone: zone, hour12: false, year: "numeric", month: "2-digit", day: "2-digit",
                                                   hour: "2-digit", minute: "2-digit", second: "2-digit" }).formatToParts(new Date(ms));
    var v = {}; parts.forEach(function (p) { v[p.type] = p.value; });
    return Date.UTC(+v.year, +v.month - 1, +v.day, +v.hour % 24, +v.minute, +v.second) - Math.floor(ms / 1000) * 1000;
  }

  function styleOf(p) { return p.suspect ? "crossRot" : (p.evidence ? "rectRot" : "circle"); }
  function radiusOf(p) { return p.suspect ? 8 : (p.evidence ? 7 : 3); }

  window.lytestreamCharts = {};
  data.panels.forEach(function (panel) {
    var canvas = document.getElementById("chart-" + panel.analyte);
    if (!canvas) { return; }
    var values = panel.points.map(function (p) { return p.y; }).concat((panel.corrected || []).map(function (p) { return p.y; }));
    var lows = panel.bands.filter(function (b) { return b.to !== null; }).map(function (b) { return b.to; });
    var highs = panel.bands.filter(function (b) { return b.from !== null; }).map(function (b) { return b.from; });
    var lo = Math.min.apply(null, values.concat(lows)), hi = Math.max.apply(null, values.concat(highs));
    if (!isFinite(lo)) { lo = 0; hi = 1; }
    var pad = (hi - lo) * 0.08 || 1;
    var yMin = lo - pad, yMax = hi + pad;

    var annotations = {};
    panel.bands.forEach(function (band, i) {
      annotations["band" + i] = {
        type: "box", drawTime: "beforeDatasetsDraw", backgroundColor: DANGER, borderWidth: 0,
        yMin: band.from === null ? yMin : band.from, yMax: band.to === null ? yMax : band.to,
        label: { display: true, content: band.label, position: { x: "start", y: band.from === null ? "end" : "start" }, color: "#7a1014", font: { size: 11 } }
      };
    });
    data.insulin.forEach(function (period, i) {
      annotations["insulin" + i] = {
        type: "box", drawTime: "beforeDatasetsDraw", backgroundColor: INSULIN, borderWidth: 0, xMin: period.from, xMax: period.to,
        label: { display: panel.analyte === "potassium" || panel.analyte === "glucose", content: period.label + (period.running ? " (running)" : ""),
                 position: { x: "start", y: "start" }, color: "#16324f", font: { size: 11 } }
      };
    });
    if (panel.rate) {
      annotations.rate = {
        type: "line", xMin: panel.rate.x0, xMax: panel.rate.x1, yMin: panel.rate.y0, yMax: panel.rate.y1,
        borderColor: SUSPECT, borderWidth: 2, borderDash: [2, 3],
        label: { display: true, content: panel.rate.label, backgroundColor: "#ffffff", color: "#7a1014", borderColor: SUSPECT, borderWidth: 1, font: { size: 12, weight: "bold" } }
      };
    }

    var datasets = [{
      label: panel.label + " measured", data: panel.points, borderColor: MEASURED, backgroundColor: MEASURED, showLine: true,
      pointStyle: panel.points.map(styleOf), pointRadius: panel.points.map(radiusOf),
      pointBorderColor: panel.points.map(function (p) { return p.suspect ? SUSPECT : (p.evidence ? INK : MEASURED); }),
      pointBackgroundColor: panel.points.map(function (p) { return p.evidence ? INK : MEASURED; }),
      pointBorderWidth: panel.points.map(function (p) { return p.suspect ? 3 : 1; })
    }];
    if (panel.corrected && panel.corrected.length) {
      datasets.push({ label: "Glucose-corrected sodium", data: panel.corrected, borderColor: CORRECTED, backgroundColor: CORRECTED,
                      showLine: true, borderDash: [6, 4], pointStyle: "triangle", pointRadius: 5 });
    }
    window.lytestreamCharts[panel.analyte] = new Chart(canvas, {
      type: "scatter",
      data: { datasets: datasets },
      options: {
        animation: false, maintainAspectRatio: false, responsive: true,
        scales: {
          x: { type: "linear", min: data.window.start, max: data.window.end, afterBuildTicks: roundTicks,
               ticks: { autoSkip: true, maxRotation: 0, callback: function (v) { return format.format(new Date(v)); } } },
          // One width for every panel's value axis, so the time axes line up from panel to panel.
          y: { min: yMin, max: yMax, title: { display: true, text: panel.unit }, ticks: { includeBounds: false },
               afterFit: function (scale) { scale.width = 64; } }
        },
        plugins: {
          legend: { display: datasets.length > 1, labels: { usePointStyle: true } },
          tooltip: { callbacks: { label: function (item) {
            var p = item.raw;
            var words = (p.comparator || "") + p.y + " " + panel.unit + " at " + format.format(new Date(p.x));
            if (p.evidence) { words += "; evidence of this Flag"; }
            if (p.suspect) { words += "; possible specimen artefact: " + p.suspect; }
            return words;
          } } },
          annotation: { annotations: annotations }
        }
      }
    });
  });
  document.body.setAttribute("data-charts-ready", String(Object.keys(window.lytestreamCharts).length));
})();
