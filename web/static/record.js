/* Reading page: spectrum with order markers from this record's forcing frequency (zoom, cursor read-out in
   Hz and orders), waveform with the subharmonic envelope and fitted growth line, the analysis numbers with
   their confidence intervals, and a waterfall of the point's recent spectra. */
"use strict";
(function () {
  const { el, $ } = HW;
  let bundle = null, spec = null, tz = "UTC";
  const ORDERS = [0.5, 1, 1.5, 2, 2.5, 3, 3.5, 4, 5];

  const orderName = (k) => `${k}X`;

  function number(label, value, unit, ci, title) {
    return el("div", { class: "n", title: title || null },
      el("div", { class: "k" }, label), el("div", { class: "v" }, value, unit ? ` ${unit}` : ""),
      ci ? el("div", { class: "ci" }, ci) : null);
  }

  function renderNumbers(r, rec) {
    const box = $("#numbers");
    box.replaceChildren();
    const s = r.subharmonic || {}, g = r.growth || {}, o = r.overall || {}, f = r.forcing || {};
    const one = (r.orders || {})["1X"] || {}, two = (r.orders || {})["2X"] || {};
    const u = r.units || rec.units;
    box.append(
      number("Forcing frequency (1X)", HW.num(f.frequency_hz, 5), "Hz", `${f.source}${f.nominal_hz ? `,
        nominal ${HW.num(f.nominal_hz, 5)} Hz` : ""}`),
      number("Subharmonic", s.detected ? `${s.class} found` : "none found", "",
        s.detected ? `at ${HW.num(s.frequency_hz, 5)} Hz = ${HW.num(s.order, 4)}X` : `false-alarm rate `
            + `${HW.num(s.pfa)} per search`),
      number("Subharmonic velocity r.m.s.", HW.num(s.velocity_rms_mm_s), "mm/s r.m.s.",
        `peak ${HW.num(s.velocity_peak_mm_s)} mm/s · acceleration ${HW.num(s.accel_peak)} ${u} peak`),
      number("Signal to noise", HW.num(s.snr_db), "dB",
        `detection threshold ${HW.num(s.threshold_db)} dB (false-alarm rate ${HW.num(s.pfa)})`),
      growthNumber(g),
      doublingNumber(g),
      number("Overall velocity r.m.s.", HW.num(o.velocity_rms_mm_s), "mm/s r.m.s.",
        o.band_hz ? `band ${HW.num(o.band_hz[0])} – ${HW.num(o.band_hz[1], 4)} Hz` : null),
      zoneNumber(o),
      number("1X velocity r.m.s.", HW.num(one.velocity_rms_mm_s), "mm/s r.m.s.",
        `peak ${HW.num(one.velocity_peak_mm_s)} mm/s · acceleration ${HW.num(one.accel_peak)} ${u} peak`),
      number("2X velocity r.m.s.", HW.num(two.velocity_rms_mm_s), "mm/s r.m.s.",
        `peak ${HW.num(two.velocity_peak_mm_s)} mm/s · acceleration ${HW.num(two.accel_peak)} ${u} peak`),
      number("Crest factor / kurtosis",
        `${HW.num((r.waveform || {}).crest_factor)} / ${HW.num((r.waveform || {}).kurtosis)}`, "",
        "kurtosis 3 for Gaussian noise, 1.5 for a sine"),
      number("Spectrum", `${HW.num((r.spectrum_summary || {}).df_hz)} Hz`, "lines",
        `${(r.spectrum_summary || {}).n_segments} averages (Welch)`),
    );
    renderPrecursor(s.precursor, box);
    const cover = bundle.zone_band || { covered: true };
    $("#band-note").hidden = cover.covered;
    $("#band-note").textContent = cover.covered ? "" : cover.text;
    $("#limits-note").textContent = bundle.limits_source || "";
    const q = r.quality || {};
    $("#quality-note").textContent = q.ok === false ? `Data quality: NOT fit for judging the machine `
        + `(${(q.flags || []).join(", ")}).`
      : `Data quality: fit${q.flags && q.flags.length ? ` (notes: ${q.flags.join(", ")})` : ""}. Analysis `
          + `version ${r.analysis_version || r.version}.`;
  }

  /* The within-record growth rate in plain numbers; a rate whose 95 % interval holds 0 is "no growth". */
  function growthNumber(g) {
    const ci = g.ci95_per_s && g.ci95_per_s[0] != null ? g.ci95_per_s : null;
    if (g.rate_per_s == null) {
      return number("Growth rate", "not estimated", "", `${g.state || ""}${g.note ? ` · ${g.note}` : ""}`);
    }
    const span = ci ? `95 % interval ${HW.num(ci[0], 2)} to ${HW.num(ci[1], 2)} 1/s` : "no interval";
    if (ci && ci[0] <= 0 && ci[1] >= 0) {
      return number("Growth rate", "no significant growth", "",
        `${HW.num(g.rate_per_s, 2)} 1/s; ${span} holds 0`);
    }
    return number("Growth rate", HW.num(g.rate_per_s, 2), "1/s", `${span}${g.state ? ` · ${g.state}` : ""}`);
  }

  /* Doubling time ln 2 / rate, only for growth whose 95 % interval lies above 0 (the growth card's rule). */
  function doublingNumber(g) {
    const ci = g.ci95_per_s && g.ci95_per_s[0] != null ? g.ci95_per_s : null;
    const growing = g.rate_per_s > 0 && !(ci && ci[0] <= 0);
    const onset = g.onset_s != null ? `onset at ${HW.num(g.onset_s)} s into the reading` : null;
    return number("Doubling time", growing ? HW.num(Math.LN2 / g.rate_per_s) : "—", growing ? "s" : "",
      growing ? onset : "no significant growth");
  }

  /* The ISO 20816 zone, graded only when the reading covers the standard's band (server: zone_band). */
  function zoneNumber(o) {
    const cover = bundle.zone_band || { covered: true };
    const limits = o.zone_limits_rms_mm_s
      ? `group ${o.machine_group}, ${o.foundation} support: A/B ${o.zone_limits_rms_mm_s[0]}, `
        + `B/C ${o.zone_limits_rms_mm_s[1]}, C/D ${o.zone_limits_rms_mm_s[2]} mm/s r.m.s.` : "";
    return el("div", { class: "n", id: "zone-number" }, el("div", { class: "k" }, "ISO 20816 zone"),
      el("div", { class: "v" }, cover.covered ? HW.zoneBadge(o.zone) : "not graded"),
      el("div", { class: "ci" }, cover.covered ? limits : "the reading does not cover the standard's band"));
  }

  /* The noise-excited bump at 0.5X below threshold (analysis/record/precursor.py): its own cards and a
     plain note. */
  function renderPrecursor(p, box) {
    const note = $("#precursor-note");
    if (!p) { note.hidden = true; return; }
    const ratio = p.ratio_to_threshold != null
      ? HW.num(p.ratio_to_threshold, 3)
        + (p.ratio_to_threshold_se != null ? ` ± ${HW.num(p.ratio_to_threshold_se, 2)}` : "") : "—";
    box.append(
      number("0.5X precursor centre", HW.num(p.frequency_hz, 5), "Hz",
        `= ${HW.num(p.order, 4)}X · a resonance bump, not a line`),
      number("Precursor half-power width", HW.num(p.width_hz, 3), "Hz",
        p.resolved ? "resolved by this reading" : "upper bound: narrower than the resolution"),
      number("Precursor decay rate γ−", HW.num(p.narrow_rate_per_s, 3), "1/s",
        p.note ? `${p.note}; falls to 0 at the threshold` : "falls to 0 at the threshold"),
      number("Precursor phase coherence", HW.num(p.coherence, 3), "",
        `a steady line here would give ${HW.num(p.line_coherence, 3)} · evidence: ${p.evidence}`),
      number("Distance to threshold h/h_c", ratio, "",
        p.ratio_to_threshold != null ? "two-Lorentzian fit (1 = onset)" : (p.note || "not estimated")),
    );
    note.hidden = false;
    note.textContent = `0.5X precursor: a noise-excited resonance bump centred at `
        + `${HW.num(p.frequency_hz, 5)} Hz (${HW.num(p.order, 4)}X), `
      + `${HW.num(p.width_hz, 3)} Hz wide at half power. It is not a detected half-order line: the machine `
          + `is still below its `
      + "parametric threshold, and the mode near 0.5X is only being shaken by noise. As the machine "
          + "approaches the threshold "
      + "the bump narrows and its decay rate γ− falls towards 0; watch its trend on the machine page."
      + (p.note ? ` Note: ${p.note}.` : "");
  }

  /* The precursor's half-power band as a shaded trace (so it has a legend entry and can be hovered). */
  function precursorBand(p, ylo, yhi) {
    if (!p || p.frequency_hz == null || p.width_hz == null) return null;
    const a = p.frequency_hz - p.width_hz / 2, b = p.frequency_hz + p.width_hz / 2;
    return { x: [a, a, b, b, a], y: [ylo, yhi, yhi, ylo, ylo], type: "scatter", mode: "lines", fill: "toself",
      fillcolor: "rgba(14,116,144,0.22)", line: { color: HW.palette.precursor, width: 1 },
      name: `0.5X precursor bump (half-power width ${HW.num(p.width_hz, 3)} Hz), not a line`,
      customdata: [p.frequency_hz],
        hovertemplate: `precursor centre ${HW.num(p.frequency_hz, 5)} Hz, width ${HW.num(p.width_hz, 3)} `
            + `Hz<extra></extra>` };
  }

  function drawSpectrum() {
    const F = spec.forcing_hz;
    const unit = bundle.record.units;
    const fmax = spec.freqs_hz[spec.freqs_hz.length - 1];
    const ymax = Math.max(...spec.amplitude);
    const orders = ORDERS.filter((k) => k * F <= fmax);
    const traces = [
      { x: spec.freqs_hz, y: spec.amplitude, type: "scatter", mode: "lines", line: { color: "#1f3b4d",
        width: 1.2 },
        name: `amplitude (${unit}, peak)`,
        hovertemplate: "%{x:.4g} Hz<br>%{y:.4g} " + unit + "<extra></extra>" },
      { x: orders.map((k) => k * F), y: orders.map(() => ymax * 1.05), text: orders.map(orderName),
        type: "scatter",
        mode: "markers+text",
        textposition: "top center", marker: { symbol: "triangle-down", size: 9,
          color: orders.map((k) => (k === 0.5 ? HW.palette.half : "#64748b")) },
        name: "order markers", hovertemplate: "%{text} = %{x:.4g} Hz<extra></extra>" },
    ];
    const shapes = orders.map((k) => ({ type: "line", x0: k * F, x1: k * F, yref: "paper", y0: 0, y1: 0.93,
      line: { color: k === 0.5 ? HW.palette.half : "#94a3b8", width: k === 0.5 ? 1.6 : 1,
        dash: k % 1 ? "dot" : "dash" } }));
    const s = bundle.result.subharmonic || {};
    const pre = s.precursor;
    // the bump's own peak
    const near = pre ? 2 * (pre.width_hz || 0) + 2 * (spec.freqs_hz[1] - spec.freqs_hz[0]) : 0;
    const band = pre && precursorBand(pre, Math.min(...spec.amplitude.filter((v) => v > 0)),
      1.25 * peakIn(pre.frequency_hz - near, pre.frequency_hz + near));
    if (band) traces.push(band);
    if (s.detected) traces.push({ x: [s.frequency_hz], y: [s.accel_peak], type: "scatter", mode: "markers",
      marker: { symbol: "diamond", size: 11, color: HW.palette.half, line: { color: "#fff", width: 1 } },
        name: `${s.class} line found` });
    return HW.plot("chart-spectrum", traces, {
      xaxis: { title: { text: "frequency (Hz)" }, range: [0, Math.min(fmax, 5.2 * F)] },
      yaxis: { title: { text: `acceleration amplitude (${unit} peak)` },
        type: $("#log-y").checked ? "log" : "linear" }, shapes, hovermode: "x" });
  }

  /* The same lines as velocity r.m.s. (mm/s), the measure of the ISO zones and the alarm rules. */
  function drawVelocity() {
    const v = bundle.velocity_spectrum;
    if (!v) return null;
    const F = spec.forcing_hz;
    const fmax = v.freqs_hz[v.freqs_hz.length - 1];
    const orders = ORDERS.filter((k) => k * F <= fmax);
    const shapes = orders.map((k) => ({ type: "line", x0: k * F, x1: k * F, yref: "paper", y0: 0, y1: 0.93,
      line: { color: k === 0.5 ? HW.palette.half : "#94a3b8", width: k === 0.5 ? 1.6 : 1,
        dash: k % 1 ? "dot" : "dash" } }));
    $("#velocity-note").textContent = `Velocity r.m.s. of each line = acceleration peak / (2π f) / √2, `
      + `from ${HW.num(v.low_hz)} Hz up (below it integration only lifts noise). Dashed: orders of `
      + `${HW.num(F, 4)} Hz, as on the acceleration spectrum.`;
    return HW.plot("chart-velocity", [{ x: v.freqs_hz, y: v.velocity_rms_mm_s, type: "scatter", mode: "lines",
      line: { color: HW.palette.overall, width: 1.2 }, name: "velocity (mm/s r.m.s.)", connectgaps: false,
      hovertemplate: "%{x:.4g} Hz<br>%{y:.3g} mm/s r.m.s.<extra></extra>" }], {
      xaxis: { title: { text: "frequency (Hz)" }, range: [0, Math.min(fmax, 5.2 * F)] },
      yaxis: { title: { text: "velocity amplitude (mm/s r.m.s.)" },
        type: $("#log-y").checked ? "log" : "linear" }, shapes, hovermode: "x" });
  }

  function bindReadout() {
    const div = $("#chart-spectrum");
    const F = spec.forcing_hz;
    div.on("plotly_hover", (ev) => {
      const p = ev.points.find((q) => q.curveNumber === 0) || ev.points[0];
      $("#readout").textContent = `${HW.num(p.x, 5)} Hz = ${(p.x / F).toFixed(3)}X · `
        + `${HW.num(p.y, 4)} ${bundle.record.units} peak`;
    });
  }

  /* Largest spectrum amplitude between lo and hi (Hz). */
  function peakIn(lo, hi) {
    let top = 0;
    spec.freqs_hz.forEach((f, i) => {
      if (f >= lo && f <= hi && spec.amplitude[i] > top) top = spec.amplitude[i];
    });
    return top;
  }

  /* Zoom the frequency axis; on a linear axis the amplitude axis follows what is in view (so a small 0.5X
     bump is not flattened by 1X), and the order markers move to the top of the new range. */
  function zoom(lo, hi) {
    const div = document.getElementById("chart-spectrum");
    const bandTop = div.data.filter((t) => t.fill === "toself" && t.x.some((x) => x >= lo && x <= hi))
      .map((t) => Math.max(...t.y));
    const top = Math.max(peakIn(lo, hi), ...bandTop) || 1;
    const layout = { "xaxis.range": [lo, hi], "xaxis.autorange": false };
    if (!$("#log-y").checked) Object.assign(layout, { "yaxis.range": [0, top * 1.15],
      "yaxis.autorange": false });
    Plotly.update(div, { y: [div.data[1].x.map(() => top * 1.05)] }, layout, [1]);
    const vel = document.getElementById("chart-velocity");
    if (vel.data) Plotly.relayout(vel, { "xaxis.range": [lo, hi], "xaxis.autorange": false,
      "yaxis.autorange": true });
  }

  /* Retention (server/retention): is the raw waveform still stored, what keeps it,
    and the pin for engineers. */
  async function renderRetention() {
    const id = bundle.record.id;
    const st = await HW.api(`/api/v1/records/${id}/retention`);
    const w = st.waveform, why = { pinned: "pinned by an engineer", alarm: "near an alarm transition",
      "daily-first": "the first reading of its day", "route-walk": "a reading of the latest route walk" };
    $("#retention-card").hidden = false;
    $("#retention-note").textContent = !w.kept
      ? `The raw waveform of this reading was removed by retention on ${HW.when(w.removed_at, tz)} (older `
          + `than ${st.horizon_days} days and held by no keep rule). The analysis result, the spectrum and `
              + `the 0.5X envelope are kept.`
      : st.pin ? `Kept: pinned by ${st.pin.pinned_by} on `
          + `${HW.when(st.pin.pinned_at, tz)}${st.pin.note ? ` (${st.pin.note})` : ""}.`
        : `Stored. Raw waveforms older than ${st.horizon_days} days are removed unless a keep rule holds `
            + "them" + (st.kept_by.length
              ? `; this one is kept as ${st.kept_by.map((k) => why[k] || k).join(", ")}` : "") + ".";
    const may = HW.may("engineer") && w.kept;
    $("#pin-button").hidden = !may || !!st.pin;
    $("#pin-note").hidden = $("#pin-button").hidden;
    $("label[for=pin-note]").hidden = $("#pin-button").hidden;
    $("#unpin-button").hidden = !may || !st.pin;
    return st;
  }

  async function pin(on) {
    $("#pin-error").hidden = true;
    try {
      await HW.api(`/api/v1/records/${bundle.record.id}/pin`, on ? { method: "PUT",
        json: { note: $("#pin-note").value } } : { method: "DELETE" });
      await renderRetention();
    } catch (e) { HW.showError("#pin-error", e); }
  }

  async function drawWaveform(kept) {
    const unit = bundle.record.units;
    const traces = [];
    if (kept) {
      const w = await HW.api(`/api/v1/records/${bundle.record.id}/waveform?max_points=4000`);
      traces.push({ x: w.t_s, y: w.value, type: "scatter", mode: "lines", line: { color: "#94a3b8",
        width: 0.8 },
        name: `acceleration (${unit}, instantaneous)` });
    }
    if (spec.envelope && spec.envelope.length) {
      traces.push({ x: spec.envelope_t_s, y: spec.envelope, type: "scatter", mode: "lines",
        line: { color: HW.palette.half, width: 2 }, name: `subharmonic envelope (${unit} peak)` });
    }
    const g = bundle.result.growth || {};
    if (g.rate_per_s != null && g.intercept != null && g.fit_window_s && g.fit_window_s[0] != null) {
      const [a, b] = g.fit_window_s;
      const xs = Array.from({ length: 40 }, (_, i) => a + (b - a) * i / 39);
      traces.push({ x: xs, y: xs.map((t) => Math.exp(g.intercept + g.rate_per_s * t)), type: "scatter",
        mode: "lines",
        line: { color: HW.palette.fit, width: 2, dash: "dash" },
          name: `fitted growth ${HW.num(g.rate_per_s)} 1/s` });
      $("#growth-note").textContent = `Envelope of the band ${HW.num(g.band_hz && g.band_hz[0])} – `
          + `${HW.num(g.band_hz && g.band_hz[1])} Hz fitted from ${HW.num(a)} s to ${HW.num(b)} s `
              + `(${g.n_points} points): ln(envelope) = ${HW.num(g.intercept)} + ${HW.num(g.rate_per_s)}·t.`;
    } else {
      $("#growth-note").textContent = `No growth line: ${g.note || g.state || "not estimated"}.`;
    }
    if (!kept) $("#growth-note").textContent += " The raw waveform was removed by retention: only the "
        + "stored envelope and fit are drawn.";
    return HW.plot("chart-waveform", traces, { xaxis: { title: { text: "time in the reading (s)" } },
      yaxis: { title: { text: `acceleration (${unit}; envelope: ${unit} peak)` } } });
  }

  async function drawWaterfall() {
    const wf = await HW.api(`/api/v1/dashboard/records/${bundle.record.id}/waterfall?n=21`);
    if (!wf.spectra.length) return null;
    const F = spec.forcing_hz;
    const fmax = Math.min(5.2 * F, wf.spectra[0].freqs_hz[wf.spectra[0].freqs_hz.length - 1]);
    const x = wf.spectra[0].freqs_hz.filter((f) => f <= fmax);
    const z = wf.spectra.map((s) => s.freqs_hz.length === wf.spectra[0].freqs_hz.length ? s.amplitude.slice(0,
      x.length) : x.map(() => null));
    const y = wf.spectra.map((s) => HW.wall(s.measured_at, tz).slice(0, 16));
    const unit = wf.spectra[0].units || bundle.record.units;
    const traces = [{ x, y, z, type: "heatmap", colorscale: [[0, "#fbfaf6"], [0.25, "#c7d2fe"], [0.6,
      "#6d28d9"], [1,
      "#1e1b4b"]],
      colorbar: { title: { text: `${unit} peak` } }, name: "amplitude",
        hovertemplate: "%{x:.4g} Hz<br>%{y}<br>%{z:.3g} " + unit + "<extra></extra>" }];
    const shapes = [0.5, 1].map((k) => ({ type: "line", x0: k * F, x1: k * F, yref: "paper", y0: 0, y1: 1,
      line: { color: k === 0.5 ? "#f59e0b" : "#0f766e", dash: "dash", width: 1.4 } }));
    const at = wf.spectra.findIndex((s) => s.opened);
    if (at >= 0) {  // the opened reading: framed, and named on the axis
      shapes.push({ type: "rect", xref: "paper", x0: 0, x1: 1, y0: at - 0.5, y1: at + 0.5,
        line: { color: "#b91c1c", width: 2 }, fillcolor: "rgba(0,0,0,0)" });
      y[at] = `▶ ${y[at]}`;
    }
    $("#waterfall-note").textContent = `${wf.spectra.length} readings of this point around this one `
      + `(${at} older, ${wf.spectra.length - 1 - at} newer; newest at the top); shading is the acceleration `
      + "amplitude (peak). The framed row (▶) is this reading; the dashed lines are its 0.5X and 1X.";
    return HW.plot("chart-waterfall", traces, { xaxis: { title: { text: "frequency (Hz)" } },
      yaxis: { title: { text: `reading time (${tz})` }, type: "category" }, shapes, showlegend: false,
      margin: { l: 140 } });
  }

  function renderHead() {
    const rec = bundle.record, a = bundle.asset, p = bundle.point;
    tz = a.timezone;
    document.title = `Reading ${rec.id} · ${a.name} · halfwatch`;
    $("#record-title").textContent = `${a.name} · ${p.name} · ${HW.when(rec.measured_at, tz)}`;
    const speed = rec.speed_hz ? `${HW.num(rec.speed_hz, 5)} Hz (${rec.speed_source || "given"})`
      : "not given";
    $("#record-where").textContent = `${a.site} › ${a.area} · reading ${rec.id} · `
      + `${rec.n_samples} samples at ${HW.num(rec.fs_hz, 5)} Hz (${HW.num(rec.duration_s)} s) · `
      + `${rec.units} · shaft speed ${speed} · from ${rec.origin} by ${rec.uploader} · times in ${tz}`;
    const nav = $("#record-nav");
    nav.replaceChildren(el("a", { href: `/assets/${a.id}?point=${p.id}` }, `← ${a.name} trends`), " · ",
      bundle.older_id ? el("a", { href: `/records/${bundle.older_id}` }, "older reading") : "oldest reading",
        " · ",
      bundle.newer_id ? el("a", { href: `/records/${bundle.newer_id}` }, "newer reading") : "newest reading",
        " · ",
      el("a", { href: `/points/${p.id}/window` }, "operating window"));
  }

  async function load() {
    const id = $("#record-root").dataset.recordId;
    try { bundle = await HW.api(`/api/v1/dashboard/records/${id}`); }
    catch (e) { HW.showError("#record-error", e); return; }
    renderHead();
    if (!bundle.result) {
      const j = bundle.job || {};
      const box = $("#record-pending");
      box.hidden = false;
      box.textContent = j.state === "failed" ? `The analysis failed: ${j.error}` : `The analysis is `
          + `${j.state || "waiting"}; this page refreshes when it is done.`;
      if (j.state !== "failed") setTimeout(load, 1500);
      return;
    }
    $("#record-pending").hidden = true;
    renderNumbers(bundle.result, bundle.record);
    spec = await HW.api(`/api/v1/records/${id}/spectrum`);
    await Promise.all([drawSpectrum(), drawVelocity()]);
    bindReadout();
    const kept = await renderRetention().then((st) => st.waveform.kept, () => true);
    await Promise.all([drawWaveform(kept), drawWaterfall()]);
    document.body.dataset.ready = "1";
  }

  document.addEventListener("DOMContentLoaded", () => {
    $("#pin-button").addEventListener("click", () => pin(true));
    $("#unpin-button").addEventListener("click", () => pin(false));
    $("#zoom-orders").addEventListener("click", () => spec && zoom(0, 5.2 * spec.forcing_hz));
    $("#zoom-half").addEventListener("click", () => spec && zoom(0.28 * spec.forcing_hz,
      0.72 * spec.forcing_hz));
    $("#zoom-all").addEventListener("click", () => spec && zoom(0, spec.freqs_hz[spec.freqs_hz.length - 1]));
    $("#log-y").addEventListener("change", () => {
      if (!spec) return;
      for (const id of ["chart-spectrum", "chart-velocity"]) {
        if (document.getElementById(id).data) {
          Plotly.relayout(id, { "yaxis.type": $("#log-y").checked ? "log" : "linear",
            "yaxis.autorange": true });
        }
      }
    });
    load();
  });
})();
