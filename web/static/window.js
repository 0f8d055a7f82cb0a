/* Operating window: the point's readings in (forcing frequency, 1X amplitude) marked by whether the
   half-order line was present, today's operating point, and - when the physics fit exists and the data
   constrain it - the fitted instability region, the unstable band at today's amplitude and the margin. */
"use strict";
(function () {
  const { el, $ } = HW;

  function pick(obj, ...names) { for (const n of names) if (obj && obj[n] != null) return obj[n]; return null; }

  function regionTraces(fit) {
    const r = fit.region || fit.tongue || null;
    if (!r) return [];
    const x = pick(r, "forcing_hz", "speed_hz", "x");
    const lo = pick(r, "one_x_accel_peak", "y", "lower");
    if (!x || !lo) return [];
    return [{ x, y: lo, type: "scatter", mode: "lines", fill: "toself", fillcolor: "rgba(185,28,28,0.13)",
      line: { color: "#b91c1c", width: 1.5 }, name: "fitted unstable region (boundary)" }];
  }

  async function load() {
    const id = $("#window-root").dataset.pointId;
    let d;
    try { d = await HW.api(`/api/v1/dashboard/points/${id}/window`); }
    catch (e) { HW.showError("#window-error", e); return; }
    const tz = d.asset.timezone, unit = d.point.units;
    $("#window-title").textContent = `Operating window · ${d.asset.name} · ${d.point.name}`;
    $("#window-where").replaceChildren(`${d.asset.site} › ${d.asset.area} · ${d.readings.length} readings · times in ${tz} · `,
      el("a", { href: `/assets/${d.asset.id}?point=${d.point.id}` }, "trends"));
    const fit = d.fit || {};
    const pres = d.readings.filter((r) => r.present), abs = d.readings.filter((r) => !r.present);
    const tr = (rows, name, symbol, color) => ({ x: rows.map((r) => r.forcing_hz),
      y: rows.map((r) => r.one_x_accel_peak), type: "scatter", mode: "markers",
      marker: { symbol, size: 8, color, line: { color, width: 1.2 } }, name, customdata: rows.map((r) => r.record_id),
      text: rows.map((r) => HW.when(r.t, tz)),
        hovertemplate: "%{x:.4g} Hz, %{y:.3g} " + unit + "<br>%{text}<extra></extra>" });
    const traces = [...regionTraces(fit), tr(abs, "half-order absent", "circle-open", "#0f766e"), tr(pres,
      "half-order present", "diamond", "#7c3aed")];
    const shapes = [];
    const band = pick(fit, "unstable_band_hz", "band_hz");
    if (band && band[0] != null) shapes.push({ type: "rect", x0: band[0], x1: band[1], yref: "paper", y0: 0, y1: 1,
      fillcolor: "rgba(245,158,11,0.15)", line: { width: 0 }, layer: "below" });
    if (d.today) traces.push({ x: [d.today.forcing_hz], y: [d.today.one_x_accel_peak], type: "scatter",
      mode: "markers+text", text: ["today"], textposition: "top center",
      marker: { symbol: "star", size: 16, color: "#111827" }, name: "today's operating point" });
    await HW.plot("chart-window", traces, { xaxis: { title: { text: "forcing frequency 1X (Hz)" } },
      yaxis: { title: { text: `1X acceleration peak (${unit} peak)` }, rangemode: "tozero" }, shapes });
    $("#chart-window").on("plotly_click",
      (ev) => { const p = ev.points[0]; if (p && typeof p.customdata === "number") location.assign(`/records/${p.customdata}`); });
    const nums = $("#window-numbers");
    nums.replaceChildren();
    const margin = pick(fit, "margin_pct", "margin");
    if (margin != null) nums.append(el("div", { class: "n" }, el("div", { class: "k" }, "Margin to the threshold"),
      el("div", { class: "v" }, `${HW.num(margin)} %`),
      el("div", { class: "ci" },
        fit.margin_ci ? `interval ${fit.margin_ci.map((v) => HW.num(v)).join(" to ")} %` : "")));
    if (band && band[0] != null) nums.append(el("div", { class: "n" }, el("div", { class: "k" },
      "Unstable band at today's 1X amplitude"), el("div", { class: "v" },
      `${HW.num(band[0], 4)} – ${HW.num(band[1], 4)} Hz`)));
    if (d.today) nums.append(el("div", { class: "n" }, el("div", { class: "k" }, "Today"), el("div", { class: "v" },
      `${HW.num(d.today.forcing_hz, 4)} Hz · ${HW.num(d.today.one_x_accel_peak)} ${unit} peak`), el("div",
      { class: "ci" }, HW.when(d.today.t, tz))));
    $("#window-message").textContent = fit.message || (fit.status ? `Fit: ${fit.status}.` : "");
    document.body.dataset.ready = "1";
  }
  document.addEventListener("DOMContentLoaded", load);
})();
