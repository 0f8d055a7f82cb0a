/* Operating window: the point's readings in (forcing frequency, 1X acceleration peak) marked by whether the
   half-order line was present, today's operating point, the fitted instability region with the unstable
   band at today's amplitude, grey where no speed was run (the tongue is extrapolated there), the fitted
   mode with its 95 % intervals, and the plain conclusion written by the server (analysis.window.conclusion). */
"use strict";
(function () {
  const { el, $ } = HW;
  const GREY = "rgba(100,116,139,0.16)";

  function regionTrace(fit) {
    const r = fit.region;
    if (!r || !r.forcing_hz || !r.one_x_accel_peak) return [];
    return [{ x: r.forcing_hz, y: r.one_x_accel_peak, type: "scatter", mode: "lines", fill: "toself",
      fillcolor: "rgba(185,28,28,0.10)", line: { color: "#b91c1c", width: 1.5 },
      name: "fitted unstable region (boundary)" }];
  }

  /* Axis ranges from the data: the readings (and the band's interval on x), padded, never from zero. */
  function ranges(d, c) {
    const xs = d.readings.map((r) => r.forcing_hz), ys = d.readings.map((r) => r.one_x_accel_peak);
    if (c.band_low_ci95_hz) xs.push(c.band_low_ci95_hz[0]);
    if (c.band_high_ci95_hz) xs.push(c.band_high_ci95_hz[1]);
    if (c.skip_hz) xs.push(...c.skip_hz);
    const x0 = Math.min(...xs), x1 = Math.max(...xs), y0 = Math.min(...ys), y1 = Math.max(...ys);
    const px = Math.max((x1 - x0) * 0.05, 0.01 * x1), py = Math.max((y1 - y0) * 0.15, 0.05 * y1);
    return { x: [x0 - px, x1 + px], y: [Math.max(0, y0 - py), y1 + py] };
  }

  /* Grey rectangles over the speeds between and beyond the speed groups actually run. */
  function unseenShapes(groups, xr) {
    const out = [];
    let from = xr[0];
    for (const [lo, hi] of groups) {
      if (lo > from) out.push([from, lo]);
      from = Math.max(from, hi);
    }
    if (from < xr[1]) out.push([from, xr[1]]);
    return out.map(([a, b]) => ({ type: "rect", x0: a, x1: b, yref: "paper", y0: 0, y1: 1, fillcolor: GREY,
      line: { width: 0 }, layer: "below" }));
  }

  function numberCard(key, value, ci) {
    return el("div", { class: "n" }, el("div", { class: "k" }, key), el("div", { class: "v" }, value),
      el("div", { class: "ci" }, ci || ""));
  }

  function interval(pair, digits, unit) {
    return pair ? `95 % interval ${HW.num(pair[0], digits)} to ${HW.num(pair[1], digits)}${unit}` : "no interval";
  }

  async function load() {
    const id = $("#window-root").dataset.pointId;
    let d;
    try { d = await HW.api(`/api/v1/dashboard/points/${id}/window`); }
    catch (e) { HW.showError("#window-error", e); return; }
    const tz = d.asset.timezone, unit = d.point.units;
    $("#window-title").textContent = `Operating window · ${d.asset.name} · ${d.point.name}`;
    $("#window-where").replaceChildren(`${d.asset.site} › ${d.asset.area} · ${d.readings.length} readings · `
      + `times in ${tz} · `, el("a", { href: `/assets/${d.asset.id}?point=${d.point.id}` }, "trends"));
    const fit = d.fit || {}, c = d.conclusion || {};
    $("#window-conclusion").textContent = c.text || fit.message || "";
    const ext = $("#window-extrapolated");
    ext.hidden = !(c.extrapolated_low || c.extrapolated_high);
    if (!ext.hidden) ext.replaceChildren(el("strong", {}, "Extrapolated: "), "the grey speeds on the chart were "
      + "never run, so the tongue there comes from the model, not from readings.");
    $("#window-skip").textContent = c.skip_text || "";
    $("#window-caution").textContent = c.caution || "";
    if (!d.readings.length) { document.body.dataset.ready = "1"; return; }

    const pres = d.readings.filter((r) => r.present), abs = d.readings.filter((r) => !r.present);
    const tr = (rows, name, symbol, color) => ({ x: rows.map((r) => r.forcing_hz),
      y: rows.map((r) => r.one_x_accel_peak), type: "scatter", mode: "markers",
      marker: { symbol, size: 8, color, line: { color, width: 1.2 } }, name,
      customdata: rows.map((r) => r.record_id), text: rows.map((r) => HW.when(r.t, tz)),
      hovertemplate: "%{x:.4g} Hz, %{y:.3g} " + unit + " peak<br>%{text}<extra></extra>" });
    // open circles (absent) drawn over the filled diamonds, so neither label hides the other
    const traces = [...regionTrace(fit), tr(pres, "half-order present", "diamond", "#7c3aed"),
      tr(abs, "half-order absent", "circle-open", "#0f766e")];
    const rg = ranges(d, c);
    const shapes = unseenShapes(c.observed_ranges_hz || [], rg.x);
    if (c.band_hz) shapes.push({ type: "rect", x0: c.band_hz[0], x1: c.band_hz[1], yref: "paper", y0: 0, y1: 1,
      fillcolor: "rgba(245,158,11,0.18)", line: { width: 0 }, layer: "below" });
    if (c.skip_hz) for (const x of c.skip_hz) shapes.push({ type: "line", x0: x, x1: x, yref: "paper", y0: 0,
      y1: 1, line: { color: "#92400e", width: 1.5, dash: "dash" } });
    if (d.today) traces.push({ x: [d.today.forcing_hz], y: [d.today.one_x_accel_peak], type: "scatter",
      mode: "markers+text", text: ["today"], textposition: "top center",
      marker: { symbol: "star", size: 16, color: "#111827" }, name: "today's operating point" });
    await HW.plot("chart-window", traces, { xaxis: { title: { text: "forcing frequency 1X (Hz)" }, range: rg.x },
      yaxis: { title: { text: `1X acceleration peak (${unit} peak)` }, range: rg.y }, shapes });
    $("#chart-window").on("plotly_click", (ev) => {
      const p = ev.points[0];
      if (p && typeof p.customdata === "number") location.assign(`/records/${p.customdata}`);
    });

    const nums = $("#window-numbers");
    nums.replaceChildren();
    if (fit.f0_hz != null) nums.append(numberCard("Mode natural frequency f0", `${HW.num(fit.f0_hz, 4)} Hz`,
      interval(fit.f0_hz_ci95, 4, " Hz")));
    if (fit.zeta != null) nums.append(numberCard("Mode damping ratio ζ", HW.num(fit.zeta, 2),
      interval(fit.zeta_ci95, 2, "")));
    if (fit.margin_pct != null) nums.append(numberCard("Margin to the threshold at today's speed",
      `${HW.num(fit.margin_pct)} %`, fit.margin_ci ? interval(fit.margin_ci, 3, " %") : ""));
    if (c.band_hz) nums.append(numberCard("Unstable band at today's 1X acceleration peak",
      `${HW.num(c.band_hz[0], 4)} – ${HW.num(c.band_hz[1], 4)} Hz`,
      `${HW.num(c.band_rpm[0], 4)} – ${HW.num(c.band_rpm[1], 4)} r/min`));
    if (c.skip_hz) nums.append(numberCard("Skipped-speed range (variable-speed drive)",
      `${HW.num(c.skip_hz[0], 4)} – ${HW.num(c.skip_hz[1], 4)} Hz`,
      `${HW.num(c.skip_rpm[0], 4)} – ${HW.num(c.skip_rpm[1], 4)} r/min · `
      + `margin ${HW.num(c.margin_pct)} % of speed`));
    if (d.today) nums.append(numberCard("Today", `${HW.num(d.today.forcing_hz, 4)} Hz · `
      + `${HW.num(d.today.one_x_accel_peak)} ${unit} peak 1X`, HW.when(d.today.t, tz)));
    $("#window-message").textContent = fit.message ? `Fit: ${fit.message}.` : (fit.status ? `Fit: ${fit.status}.` : "");
    const groups = (c.observed_ranges_hz || []).map(([lo, hi]) => `${HW.num(lo, 4)}–${HW.num(hi, 4)} Hz`);
    $("#window-speeds").textContent = groups.length ? `Speeds run (1X): ${groups.join(", ")}.` : "";
    document.body.dataset.ready = "1";
  }
  document.addEventListener("DOMContentLoaded", load);
})();
