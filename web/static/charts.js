/* halfwatch dashboard: the one plotly wrapper. Every chart goes through HW.plot(id, traces, layout), which
   calls Plotly.react (so redraws reuse the div) with the house look,
     and insists on axis titles with units. */
"use strict";
(function (HW) {
  const INK = "#1f2a30";
  HW.palette = { half: "#7c3aed", onex: "#0f766e", ratio: "#b45309", overall: "#1d4ed8", growth: "#be185d",
    precursor: "#0e7490",
    speed: "#475569", fit: "#111827", band: "rgba(17,24,39,0.12)", limit: "#b91c1c", alert: "#b45309" };
  /* ISO 20816 zone bands: pale fills, each band also named in text on the chart */
  HW.zoneFill = { A: "rgba(22,163,74,0.10)", B: "rgba(132,204,22,0.12)", C: "rgba(234,179,8,0.16)",
    D: "rgba(220,38,38,0.14)" };

  function axisTitle(ax, name) {
    if (!ax || !ax.title || !(ax.title.text || ax.title)) {
      throw new Error(`chart ${name}: every axis needs a title with units`);
    }
  }

  HW.plot = function plot(id, traces, layout = {}, config = {}) {
    const el = typeof id === "string" ? document.getElementById(id) : id;
    axisTitle(layout.xaxis, el.id + " x");
    axisTitle(layout.yaxis, el.id + " y");
    const base = {
      font: { family: "DejaVu Sans, Verdana, sans-serif", size: 12, color: INK },
      margin: { l: 64, r: 18, t: layout.title ? 36 : 14, b: 48 },
      paper_bgcolor: "#ffffff", plot_bgcolor: "#ffffff",
      hovermode: "closest", showlegend: true,
      legend: { orientation: "h", y: -0.22, x: 0 },
    };
    const merged = Object.assign({}, base, layout);
    merged.margin = Object.assign({}, base.margin, layout.margin || {});
    for (const k of Object.keys(merged)) {
      if (/^[xy]axis\d*$/.test(k)) merged[k] = Object.assign({ gridcolor: "#e6e2d8", zeroline: false,
        automargin: true }, merged[k]);
    }
    const cfg = Object.assign({ responsive: true, displaylogo: false,
      modeBarButtonsToRemove: ["lasso2d", "select2d", "toImage"] }, config);
    el.setAttribute("role", "figure"); // a figure may hold the chart's own buttons (role img may not)
    if (!el.getAttribute("aria-label")) el.setAttribute("aria-label",
      (layout.title && layout.title.text) || el.dataset.label || "chart");
    return Plotly.react(el, traces, merged, cfg).then(() => { el.dataset.drawn = "1"; return el; });
  };

  /* A line with its min-max band (bucketed series from the server). */
  HW.bandTraces = function (x, s, name, color, yaxis) {
    const out = [];
    if (s.min && s.max) {
      out.push({ x, y: s.max, type: "scatter", mode: "lines", line: { width: 0, color }, hoverinfo: "skip",
        showlegend: false, name: name + " max", yaxis, connectgaps: false });
      out.push({ x, y: s.min, type: "scatter", mode: "lines", line: { width: 0, color }, fill: "tonexty",
        fillcolor: color + "33", name: name + " min–max", hoverinfo: "skip", yaxis, connectgaps: false });
    }
    // bucketed series (min/max present) or long ones draw as lines only: fewer SVG nodes, faster pages
    const dense = Boolean(s.min) || x.length > 400;
    out.push({ x, y: s.mean, type: "scatter", mode: dense ? "lines" : "lines+markers", marker: { size: 3,
      color },
      line: { width: 1.6, color }, name, yaxis, connectgaps: false });
    return out;
  };

  HW.hline = (y, color, dash, text) => ({ type: "line", xref: "paper", x0: 0, x1: 1, y0: y, y1: y,
    line: { color, width: 1.5, dash: dash || "dash" }, label: text ? { text, textposition: "end",
      font: { color, size: 11 } } : undefined });
})(window.HW);
