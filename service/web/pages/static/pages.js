/* Keelson's pages: draws the charts (uPlot, vendored beside this file) from the
   data-* attributes the server wrote, and refreshes running retrains. Every
   figure is also in a table, so the pages read the same with scripts off. */
(function () {
  "use strict";
  var INK = "#1c2830", ACCENT = "#1d5873", EARTH = "#8c4a12", PLUM = "#6a3d7a", GREY = "#4d5b63";

  function json(el, name) {
    try { return JSON.parse(el.getAttribute(name)); } catch (e) { return null; }
  }
  function width(el) { return Math.max(280, el.clientWidth - 24); }
  function axes(xLabel, yLabel) {
    return [{ label: xLabel, stroke: INK, grid: { stroke: "#e3e6e2" } },
            { label: yLabel, stroke: INK, grid: { stroke: "#e3e6e2" } }];
  }
  function draw(el, opts, data) {
    opts.width = width(el);
    opts.height = 260;
    var chart = new uPlot(opts, data, el);
    el.setAttribute("data-drawn", "true");
    window.addEventListener("resize", function () {
      chart.setSize({ width: width(el), height: 260 });
    });
    return chart;
  }
  function ringAt(u, x, y) {
    if (x == null || y == null) { return; }
    var ctx = u.ctx, cx = u.valToPos(x, "x", true), cy = u.valToPos(y, "y", true);
    ctx.save();
    ctx.strokeStyle = INK;
    ctx.lineWidth = 2 * devicePixelRatio;
    ctx.beginPath();
    ctx.arc(cx, cy, 7 * devicePixelRatio, 0, 2 * Math.PI);
    ctx.stroke();
    ctx.restore();
  }

  /* The training data's range on a sweep: a shaded band between dashed lines,
     labelled in words (so it is not told by colour alone). */
  function trainedBand(u, low, high) {
    var ctx = u.ctx, r = devicePixelRatio, box = u.bbox;
    var left = Math.max(box.left, u.valToPos(low, "x", true));
    var right = Math.min(box.left + box.width, u.valToPos(high, "x", true));
    if (right < left) { return; }
    ctx.save();
    ctx.fillStyle = "rgba(29, 88, 115, 0.10)";
    ctx.fillRect(left, box.top, right - left, box.height);
    ctx.strokeStyle = GREY;
    ctx.lineWidth = r;
    ctx.setLineDash([5 * r, 4 * r]);
    [left, right].forEach(function (x) {
      ctx.beginPath(); ctx.moveTo(x, box.top); ctx.lineTo(x, box.top + box.height); ctx.stroke();
    });
    ctx.fillStyle = INK;
    ctx.font = (12 * r) + "px system-ui, sans-serif";
    ctx.textBaseline = "top";
    var room = 90 * r;  // labels only where they fit; the caption and table say it too
    if (right - left > room) { ctx.fillText("training data", left + 4 * r, box.top + 4 * r); }
    if (left - box.left > room) { ctx.fillText("extrapolation", box.left + 4 * r, box.top + 4 * r); }
    if (box.left + box.width - right > room) {
      ctx.textAlign = "right";
      ctx.fillText("extrapolation", box.left + box.width - 4 * r, box.top + 4 * r);
    }
    ctx.restore();
  }

  function learningCurve(el) {
    var d = json(el, "data-series");
    if (!d || !d.x.length) { return; }
    var metric = el.getAttribute("data-metric");
    var at = d.active;
    draw(el, {
      scales: { x: { time: false } },
      axes: axes("records seen", metric),
      series: [{ label: "records seen" },
        { label: "held out", stroke: ACCENT, width: 2, points: { show: true, size: 6 } },
        { label: "prequential", stroke: EARTH, width: 2, dash: [6, 4], points: { show: true, size: 5 } },
        { label: "live", stroke: PLUM, width: 2, dash: [2, 3], points: { show: true, size: 5 } }],
      hooks: { draw: [function (u) {
        if (at != null) { ringAt(u, d.x[at], d.holdout[at] != null ? d.holdout[at] : d.prequential[at]); }
      }] }
    }, [d.x, d.holdout, d.prequential, d.live]);
  }

  function calibration(el) {
    var bins = json(el, "data-series") || [];
    if (!bins.length) { return; }
    var xs = bins.map(function (b) { return b.mean_predicted; });
    draw(el, {
      scales: { x: { time: false, range: [0, 1] }, y: { range: [0, 1] } },
      axes: axes("mean predicted probability", "observed rate"),
      series: [{ label: "predicted" },
        { label: "observed", stroke: ACCENT, width: 2, points: { show: true, size: 7 } },
        { label: "perfect", stroke: GREY, width: 1, dash: [4, 4], points: { show: false } }]
    }, [xs, bins.map(function (b) { return b.observed_rate; }), xs]);
  }

  function distribution(el) {
    var d = json(el, "data-series");
    if (!d || !d.bins.length) { return; }
    var share = function (counts) {
      var total = counts.reduce(function (a, b) { return a + b; }, 0) || 1;
      return counts.map(function (c) { return c / total; });
    };
    var xs = d.bins.map(function (_, i) { return i; });
    draw(el, {
      scales: { x: { time: false } },
      axes: [{ label: el.getAttribute("data-field"), stroke: INK,
               values: function (u, ticks) { var names = d.labels || d.bins; return ticks.map(function (t) { return names[t] || ""; }); } },
             { label: "share of records", stroke: INK }],
      series: [{ label: "bin" },
        { label: "learned from", stroke: ACCENT, width: 2, points: { show: true, size: 6 } },
        { label: "recent", stroke: EARTH, width: 2, dash: [6, 4], points: { show: true, size: 6 } }]
    }, [xs, share(d.reference), share(d.recent)]);
  }

  function sweep(el) {
    var xs = json(el, "data-x") || [], ys = json(el, "data-y") || [];
    if (!xs.length) { return; }
    var current = parseFloat(el.getAttribute("data-current"));
    var low = parseFloat(el.getAttribute("data-trained-low")),
        high = parseFloat(el.getAttribute("data-trained-high"));
    var label = el.getAttribute("data-sweep-class");
    var at = function (x) {  // linear interpolation between the swept points
      for (var i = 1; i < xs.length; i++) {
        if (x <= xs[i]) { var t = (x - xs[i - 1]) / (xs[i] - xs[i - 1] || 1); return ys[i - 1] + t * (ys[i] - ys[i - 1]); }
      }
      return ys[ys.length - 1];
    };
    draw(el, {
      scales: { x: { time: false } },
      axes: axes(el.getAttribute("data-sweep-field"), label ? "probability of " + label : "value"),
      series: [{ label: el.getAttribute("data-sweep-field") },
        { label: label ? "p(" + label + ")" : "value", stroke: ACCENT, width: 2, points: { show: false } }],
      hooks: { drawAxes: [function (u) {
        if (!isNaN(low) && !isNaN(high)) { trainedBand(u, low, high); }
      }], draw: [function (u) {
        if (current >= xs[0] && current <= xs[xs.length - 1]) { ringAt(u, current, at(current)); }
      }] }
    }, [xs, ys]);
  }

  var DRAW = { "learning-curve": learningCurve, "calibration": calibration,
               "distribution": distribution, "sweep": sweep };
  function drawAll() {
    if (typeof uPlot === "undefined") { return; }
    var charts = document.querySelectorAll("[data-chart]");
    for (var i = 0; i < charts.length; i++) {
      var kind = charts[i].getAttribute("data-chart");
      if (DRAW[kind]) { DRAW[kind](charts[i]); }
    }
  }

  /* Retrains: while one is queued or running, ask for the jobs every few seconds. */
  function refreshJobs() {
    var table = document.querySelector("table[data-refresh]");
    if (!table) { return; }
    var busy = function () {
      return table.querySelector('tr[data-job-status="queued"], tr[data-job-status="running"]');
    };
    if (!busy()) { return; }
    var tick = function () {
      fetch(table.getAttribute("data-refresh"), { credentials: "same-origin",
                                                  headers: { "Accept": "application/json" } })
        .then(function (r) { return r.ok ? r.json() : null; })
        .then(function (body) {
          if (!body) { return; }
          body.jobs.forEach(function (job) {
            var row = table.querySelector('tr[data-job-id="' + job.id + '"]');
            if (!row) { return; }
            row.setAttribute("data-job-status", job.status);
            var p = job.progress || {};
            row.querySelector('[data-cell="status"]').textContent = job.status + (job.error ? ": " + job.error : "");
            if (p.epoch !== undefined) {
              row.querySelector('[data-cell="progress"]').textContent = "epoch " + p.epoch +
                (p.max_epochs ? " of " + p.max_epochs : "") + (p.loss != null ? ", loss " + p.loss.toFixed(4) : "");
            }
            row.querySelector('[data-cell="version"]').textContent = job.version != null ? job.version : "–";
          });
          if (busy()) { setTimeout(tick, 3000); }
        })
        .catch(function () { setTimeout(tick, 10000); });
    };
    setTimeout(tick, 3000);
  }

  document.addEventListener("DOMContentLoaded", function () { drawAll(); refreshJobs(); });
})();
