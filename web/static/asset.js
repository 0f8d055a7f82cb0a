/* Machine page: the points of one asset; trends over a chosen period (half-order, 1X, ratio, overall with
   ISO 20816 zones, growth rate, 0.5X precursor decay rate,
     speed); trend fit and forecast to the danger level with its uncertainty;
   alarm states and history; recent readings. The server buckets long periods (min, max, mean per bucket). */
"use strict";
(function () {
  const { el, $ } = HW;
  const root = () => $("#asset-root");
  let asset = null, tz = "UTC", point = null, early = null, changes = [];
  const ISO_DAY = /^\d{4}-\d{2}-\d{2}$/;
  const maxPoints = () => (/^\d+$/.test(HW.param("max_points") || "") ? HW.param("max_points") : "600");

  function periodQuery() {
    const p = $("#period").value;
    if (p !== "custom") {
      const end = new Date();
      return { start: new Date(end - Number(p) * 86400e3).toISOString(), end: end.toISOString() };
    }
    const s = $("#start").value.trim(), e = $("#end").value.trim();
    if (!ISO_DAY.test(s)) throw new HW.ApiError(0, "invalid", "give the first day as YYYY-MM-DD", "start");
    if (!ISO_DAY.test(e)) throw new HW.ApiError(0, "invalid", "give the last day as YYYY-MM-DD", "end");
    return { start: HW.fromWall(s + "T00:00", tz), end: HW.fromWall(e + "T23:59", tz) };
  }

  const xaxis = () => ({ title: { text: `time (${tz})` }, type: "date" });

  /* Speed changes as vertical lines on every chart (labelled on the speed chart). */
  function changeShapes(labelled) {
    return changes.map((c) => ({ type: "line", xref: "x", yref: "paper", x0: HW.wall(c.t, tz),
      x1: HW.wall(c.t, tz), y0: 0, y1: 1, line: { color: HW.palette.speed, width: 1.5, dash: "dashdot" },
      label: labelled ? { text: `speed ${HW.num(c.from_hz, 4)} → ${HW.num(c.to_hz, 4)} Hz`,
        textposition: "end", font: { size: 11, color: HW.palette.speed } } : undefined }));
  }
  function withChanges(layout, labelled) {
    layout.shapes = (layout.shapes || []).concat(changeShapes(labelled));
    return layout;
  }

  /* Detected / not detected per reading, or per bucket (◆ when any reading of the bucket had the line). */
  function pointMarkers(d) {
    const marker = { size: d.bucketed ? 6 : 7,
      symbol: d.detected.map((x) => (x ? "diamond" : "circle-open")) };
    if (d.bucketed) {
      return { mode: "lines+markers", marker, customdata: d.count,
        hovertemplate: "%{y:.3g} (bucket mean)<br>%{x}<br>%{customdata} readings<extra></extra>" };
    }
    return { mode: "lines+markers", marker, customdata: d.record_id,
      hovertemplate: "%{y:.3g}<br>%{x}<br>reading %{customdata}<extra></extra>" };
  }

  function seriesTraces(d, x, key, name, color, unit) {
    const tr = HW.bandTraces(x, d[key], name, color);
    Object.assign(tr[tr.length - 1], pointMarkers(d));
    tr[tr.length - 1].name = `${name} (${unit})`;
    if (tr[tr.length - 1].marker && color) tr[tr.length - 1].marker.color = color;
    return tr;
  }

  /* The half-order line in the measure its alarm rule compares: velocity r.m.s. (peak / √2 of the line),
     against the rule's alert and danger levels (mm/s r.m.s.) and the forecast the alarm emails give. */
  function drawHalf(d, x, levels) {
    const traces = seriesTraces(d, x, "half_order_velocity_rms_mm_s", "half-order velocity r.m.s.",
      HW.palette.half, "mm/s r.m.s.");
    const shapes = [];
    const t = d.trend || {};
    if (t.band) {
      const bx = t.band.t.map((v) => HW.wall(v, tz));
      traces.push({ x: bx, y: t.band.hi, type: "scatter", mode: "lines", line: { width: 0 },
        showlegend: false,
        hoverinfo: "skip" });
      traces.push({ x: bx, y: t.band.lo, type: "scatter", mode: "lines", line: { width: 0 }, fill: "tonexty",
        fillcolor: HW.palette.band, name: "95 % band of the fit", hoverinfo: "skip" });
      traces.push({ x: bx, y: t.band.fit, type: "scatter", mode: "lines", line: { color: HW.palette.fit,
        width: 2 },
        name: `trend fit (${t.model})` });
    }
    const f = t.forecast;
    if (f) {
      traces.push({ x: f.t.map((v) => HW.wall(v, tz)), y: f.value, type: "scatter", mode: "lines",
        line: { color: HW.palette.fit, width: 2, dash: "dash" }, name: "forecast to the danger level" });
      if (f.cross_lo && f.cross_hi) {
        traces.push({ x: [HW.wall(f.cross_lo, tz), HW.wall(f.cross_hi, tz)],
          y: [t.limit_rms_mm_s, t.limit_rms_mm_s], type: "scatter",
          mode: "lines+markers", marker: { symbol: "line-ns-open", size: 14, color: HW.palette.limit },
          line: { color: HW.palette.limit, width: 6 }, opacity: 0.55,
            name: "90 % interval of the crossing" });
      }
    }
    if (levels && levels.danger) {
      shapes.push(HW.hline(levels.danger, HW.palette.limit, "dash",
        `danger ${HW.num(levels.danger)} mm/s r.m.s.`));
    }
    if (levels && levels.alert) {
      shapes.push(HW.hline(levels.alert, HW.palette.alert, "dot",
        `alert ${HW.num(levels.alert)} mm/s r.m.s.`));
    }
    const note = [];
    if (t.status === "forecast") {
      const hi = t.days_to_limit_hi == null ? "not bounded" : HW.num(t.days_to_limit_hi, 2);
      note.push(`Growth ${HW.num(t.growth_db_per_day)} dB/day (95 %: ${HW.num(t.growth_db_per_day_lo)} to `
        + `${HW.num(t.growth_db_per_day_hi)}); reaches the danger level `
        + `(${HW.num(t.limit_rms_mm_s)} mm/s r.m.s.) in about ${HW.num(t.days_to_limit, 2)} days, `
        + `${HW.when(t.limit_iso, tz)} (90 %: ${HW.num(t.days_to_limit_lo, 2)} to ${hi}). `
        + "The same forecast as the alarm emails (6-hour buckets of the half-order velocity r.m.s.).");
    }
    else if (t.message) note.push(`Trend: ${t.message}.`);
    if (t.onset_iso) note.push(`Onset about ${HW.when(t.onset_iso, tz)}.`);
    note.push(d.bucketed ? "Markers: ◆ a half-order line detected in the bucket, ○ in none of its "
      + "readings."
      : "Markers: ◆ half-order detected, ○ not detected.");
    if (changes.length) note.push(`Dash-dot lines: speed changes (${changes.length} in this period).`);
    $("#trend-note").textContent = note.join(" ");
    return HW.plot("chart-half", traces, withChanges({ xaxis: xaxis(),
      yaxis: { title: { text: "half-order velocity r.m.s. (mm/s r.m.s.)" }, rangemode: "tozero" }, shapes }));
  }

  function drawOverall(d, x, limits) {
    const o = d.overall_velocity_rms_mm_s;
    const traces = seriesTraces(d, x, "overall_velocity_rms_mm_s", "overall velocity r.m.s.",
      HW.palette.overall,
      "mm/s r.m.s.");
    const vals = (o.max || o.mean).filter((v) => v != null);
    const top = Math.max(...vals, limits ? limits[2] * 1.25 : 1) * 1.08;
    const shapes = [], annotations = [];
    if (limits) {
      const edges = [0, limits[0], limits[1], limits[2], top];
      "ABCD".split("").forEach((z, i) => {
        shapes.push({ type: "rect", xref: "paper", x0: 0, x1: 1, y0: edges[i], y1: edges[i + 1],
          fillcolor: HW.zoneFill[z], line: { width: 0 }, layer: "below" });
        annotations.push({ xref: "paper", x: 0.995, xanchor: "right", y: (edges[i] + edges[i + 1]) / 2,
          text: `zone ${z}`, showarrow: false, font: { size: 11, color: "#374151" } });
      });
      $("#zone-note").textContent = `ISO 20816 zone boundaries for group ${asset.asset.machine_group}, `
        + `${asset.asset.foundation} support: A/B ${limits[0]}, B/C ${limits[1]}, C/D ${limits[2]} mm/s `
            + `r.m.s. `
        + (asset.limits_source || "");
    }
    return HW.plot("chart-overall", traces, withChanges({ xaxis: xaxis(),
      yaxis: { title: { text: "velocity r.m.s. (mm/s r.m.s.)" }, range: [0, top] }, shapes, annotations }));
  }

  function simple(id, d, x, key, name, color, unit, ytitle, extra) {
    return HW.plot(id, seriesTraces(d, x, key, name, color, unit), withChanges(Object.assign({ xaxis: xaxis(),
      yaxis: { title: { text: ytitle } } }, extra || {})));
  }

  /* γ− of the noise-excited 0.5X bump (below threshold): it falls towards 0 as the machine nears the
     parametric threshold. Readings without a precursor leave gaps (the server sends null). */
  function drawPrecursor(d, x) {
    const s = d.precursor_rate_per_s || { mean: [] };
    const n = s.mean.filter((v) => v != null).length;
    const lines = d.detected.filter(Boolean).length;
    const unit = d.bucketed ? "buckets" : "readings";
    let why;
    if (n) why = `${n} ${unit} with a 0.5X precursor in this period; gaps are ${unit} without one. `;
    else if (lines) {
      why = `No 0.5X precursor in this period: a half-order line is detected in ${lines} ${unit}. Above the `
        + "parametric threshold the noise-excited bump turns into that line, so there is no bump left to "
            + "measure; "
        + "follow the half-order chart instead. ";
    } else {
      why = "No 0.5X precursor in this period: no noise-excited bump stood out at 0.5X in these readings "
        + "(the machine is far from the threshold, or the bump is below the noise floor). ";
    }
    $("#precursor-note").textContent = why
      + "γ− is the decay rate of the noise-excited mode at 0.5X (from the slow flow locked to 1X, "
      + "or π × the bump's half-power width). "
      + "A falling γ− means the machine is "
          + "approaching "
      + "the parametric threshold (γ− reaches 0 at onset); it is an early warning, not a detected "
          + "half-order line.";
    return HW.plot("chart-precursor",
      seriesTraces(d, x, "precursor_rate_per_s", "precursor γ−", HW.palette.precursor, "1/s"),
      withChanges({ xaxis: xaxis(), yaxis: { title: { text: "narrow decay rate γ− (1/s)" },
        rangemode: "tozero" },
        annotations: n ? [] : [{ xref: "paper", yref: "paper", x: 0.5, y: 0.5, showarrow: false,
          text: lines ? "no precursor: a half-order line is detected (see the note)"
            : "no 0.5X precursor in this period", font: { size: 13, color: "#5b6670" } }] }));
  }

  function drawSpeed(d, x) {
    const mult = asset.asset.forcing_multiplier || 1;
    const conv = (s) => s && { min: s.min && s.min.map((v) => v == null ? null : v / mult),
      max: s.max && s.max.map((v) => v == null ? null : v / mult),
      mean: s.mean.map((v) => v == null ? null : v / mult) };
    const dd = Object.assign({}, d, { speed: conv(d.forcing_hz) });
    const tr = seriesTraces(dd, x, "speed", "shaft speed", HW.palette.speed, "Hz");
    tr[tr.length - 1].hovertemplate = "%{y:.4g} Hz = %{customdata} rpm<extra></extra>";
    tr[tr.length - 1].customdata = dd.speed.mean.map((v) => v == null ? null : Math.round(v * 60));
    return HW.plot("chart-speed", tr, withChanges({ xaxis: xaxis(),
      yaxis: { title: { text: "shaft speed (Hz = rev/s)" } },
      shapes: [HW.hline(asset.asset.nominal_speed_hz, "#64748b", "dot",
        `nominal ${asset.asset.nominal_speed_hz} Hz`)] }, true));
  }

  function bindClicks() {
    for (const id of ["chart-half", "chart-overall", "chart-onex", "chart-ratio", "chart-growth",
      "chart-precursor",
      "chart-speed"]) {
      const div = document.getElementById(id);
      if (div.dataset.bound) continue;
      div.dataset.bound = "1";
      div.on("plotly_click", (ev) => {
        const p = ev.points && ev.points[0];
        if (p && typeof p.customdata === "number" && id !== "chart-speed") {
          location.assign(`/records/${p.customdata}`);
        }
      });
    }
  }

  async function loadSeries() {
    $("#asset-error").hidden = true;
    let q;
    try { q = periodQuery(); } catch (e) { HW.showError("#asset-error", e); return; }
    const levels = point.levels.half_order_velocity;
    const params = new URLSearchParams({ start: q.start, end: q.end, max_points: maxPoints() });
    if (levels && levels.danger) params.set("limit", levels.danger);
    let d;
    try {
      const head = early && early.pid === point.id && early.days === $("#period").value
        ? early.promise : null;
      early = null;
      d = await (head || HW.api(`/api/v1/dashboard/points/${point.id}/series?${params}`));
    } catch (e) { HW.showError("#asset-error", e); return; }
    const x = d.t.map((v) => HW.wall(v, tz));
    changes = d.speed_changes || [];
    const growthLevels = point.levels.growth_rate;
    await Promise.all([
      drawHalf(d, x, levels),
      drawOverall(d, x, asset.zone_limits_rms_mm_s),
      simple("chart-onex", d, x, "one_x_velocity_rms_mm_s", "1X velocity r.m.s.", HW.palette.onex,
        "mm/s r.m.s.",
        "1X velocity r.m.s. (mm/s r.m.s.)"),
      simple("chart-ratio", d, x, "half_order_to_1x_ratio", "half-order / 1X", HW.palette.ratio, "ratio",
        "amplitude ratio, peak / peak (1 = equal)",
        { shapes: point.levels.half_order_ratio ? [HW.hline(point.levels.half_order_ratio.danger,
          HW.palette.limit,
          "dash", "danger"), HW.hline(point.levels.half_order_ratio.alert, HW.palette.alert, "dot",
            "alert")] : [] }),
      simple("chart-growth", d, x, "growth_rate_per_s", "growth rate", HW.palette.growth, "1/s",
        "growth rate of the envelope (1/s)", { shapes: growthLevels ? [
          HW.hline(growthLevels.danger, HW.palette.limit, "dash",
            `danger ${HW.num(growthLevels.danger)} 1/s`),
          HW.hline(growthLevels.alert, HW.palette.alert, "dot",
            `alert ${HW.num(growthLevels.alert)} 1/s`)] : [] }),
      drawPrecursor(d, x),
      drawSpeed(d, x),
    ]);
    bindClicks();
    $("#bucket-note").textContent = d.bucketed
      ? `${d.n_source} readings in ${d.t.length} time buckets: lines are bucket means, shaded bands the `
        + "min–max of each bucket; markers: ◆ a half-order line in the bucket, ○ none."
      : `${d.n_source} readings; click a marker to open that reading.`;
    document.body.dataset.ready = "1";
    loadReadings();
  }

  async function loadReadings() {
    const body = $("#readings tbody");
    const r = await HW.api(`/api/v1/dashboard/points/${point.id}/readings?limit=15`);
    const cls = (rec) => !rec.analysed ? "not analysed yet"
      : rec.half_order_detected ? (rec.half_order_class || "detected") : "none detected";
    body.replaceChildren(...r.readings.map((rec) => el("tr", { "data-record-id": rec.record_id },
      el("td", {}, HW.when(rec.measured_at, tz)),
      el("td", {}, rec.speed_hz ? `${HW.num(rec.speed_hz, 4)} Hz` : "—"),
      el("td", { class: "num" }, rec.half_order_detected ? HW.num(rec.half_order_velocity_rms_mm_s) : "—"),
      el("td", {}, cls(rec)),
      el("td", { class: "num" }, HW.num(rec.overall_velocity_rms_mm_s)),
      el("td", {}, rec.analysed && !rec.zone_graded
        ? el("span", { title: "the sample rate does not reach the ISO 20816 band" }, "not graded")
        : HW.zoneBadge(rec.zone)),
      el("td", { class: "num" }, HW.num(rec.growth_rate_per_s)),
      el("td", {}, rec.origin), el("td", {}, `${rec.n_samples} @ ${HW.num(rec.fs_hz, 5)} Hz`),
      el("td", {}, el("a", { href: `/records/${rec.record_id}` }, "open reading")))));
    if (!r.readings.length) body.append(el("tr", {}, el("td", { colspan: 10 }, "No reading yet.")));
    const newest = r.readings.find((x) => x.analysed);
    $("#band-note").hidden = !newest || newest.zone_graded;
    $("#band-note").textContent = newest && !newest.zone_graded
      ? `The readings of this point (${HW.num(newest.fs_hz, 5)} Hz sampling) do not reach the `
        + "ISO 20816 band, "
        + "so no zone is graded; the zones are drawn for reference only." : "";
  }

  /* An alarm's value with its measure (the server's value_text; a bare ratio gets its measure here). */
  function valueText(a) {
    const text = a.value_text || `${HW.num(a.value)} ${a.unit || ""}`.trim();
    if (!/^-?[\d.]+$/.test(text)) return text;
    return a.metric === "half_order_ratio" ? `${text} × 1X (peak / peak)` : `${text} ${a.unit || "(ratio)"}`;
  }

  function renderAlarms() {
    const body = $("#alarm-states tbody");
    body.replaceChildren(...asset.alarms.map((a) => el("tr", {},
      el("td", {}, HW.levelBadge(a.level)), el("td", {}, a.point), el("td", {}, a.rule),
      el("td", {}, valueText(a)), el("td", {}, HW.when(a.since, tz)),
      el("td", {},
        a.shelved ? `shelved until ${HW.when(a.shelved_until, tz)}` : a.acknowledged ? `acknowledged by `
            + `${a.acked_by}` : "active"))));
    if (!asset.alarms.length) body.append(el("tr", {}, el("td", { colspan: 6 }, "No open alarm.")));
  }

  async function loadHistory() {
    const h = await HW.api(`/api/v1/alarms/history?asset_id=${asset.asset.id}&limit=30`);
    const names = Object.fromEntries(asset.points.map((p) => [p.id, p.name]));
    $("#alarm-history tbody").replaceChildren(...h.events.map((e) => el("tr", {},
      el("td", {}, HW.when(e.created_at, tz)), el("td", {}, names[e.point_id] || e.point_id),
      el("td", {}, e.kind === "transition" ? el("span", {}, HW.levelBadge(e.to_level), " ",
        e.summary || e.metric) : `${e.kind}: ${e.summary || ""}`),
      el("td", {}, e.actor), el("td", {}, e.comment || ""))));
  }

  function selectPoint(id) {
    point = asset.points.find((p) => p.id === id) || asset.points[0];
    usePointPeriod();
    const l = point.latest;
    $("#point-facts").textContent = `${point.location || "location not given"} · ${point.direction} · `
        + `records in ${point.units} · ${point.records} readings · `
        + `state: ${point.state.replace(/-/g, " ")}`;
    const links = $("#point-links");
    links.replaceChildren();
    if (l) links.append(el("a", { href: `/records/${l.record_id}` }, "latest reading"), " · ");
    links.append(el("a", { href: `/points/${point.id}/window` }, "operating window"));
    const q = new URLSearchParams({ point: point.id });
    if ($("#period").value !== "custom" && HW.param("days")) q.set("days", $("#period").value);
    if (HW.param("max_points")) q.set("max_points", maxPoints());
    describePeriod();
    history.replaceState(null, "", `?${q}`);
    return loadSeries();
  }

  /* The default period shows the last change of alarm level or speed (server: services.machine_view). */
  function usePointPeriod() {
    const dp = point.default_period;
    const offered = dp && [...$("#period").options].some((o) => o.value === String(dp.days));
    if (!HW.param("days") && offered && $("#period").value !== "custom") {
      $("#period").value = String(dp.days);
    }
  }
  function describePeriod() {
    const dp = point.default_period, days = $("#period").value;
    $("#period-note").textContent = dp && String(dp.days) === days && !HW.param("days")
      ? `Default period: last ${dp.days} days, chosen because it ${dp.reason}.` : "";
  }
  function isoDay(ms) { return HW.wall(new Date(ms).toISOString(), tz).slice(0, 10); }

  async function load() {
    const id = root().dataset.assetId;
    const p0 = Number(HW.param("point")), days0 = HW.param("days");
    // the point is known: ask for its series while the machine loads
    if (p0 && days0 && /^\d+$/.test(days0)) {
      const end = new Date();
      const q = new URLSearchParams({ start: new Date(end - Number(days0) * 86400e3).toISOString(),
        end: end.toISOString(), max_points: maxPoints() });
      early = { pid: p0, days: days0, promise: HW.api(`/api/v1/dashboard/points/${p0}/series?${q}`) };
      early.promise.catch(() => {});
    }
    try { asset = await HW.api(`/api/v1/dashboard/assets/${id}`); }
    catch (e) { HW.showError("#asset-error", e); return; }
    const a = asset.asset;
    tz = a.timezone;
    document.title = `${a.name} · halfwatch`;
    $("#asset-name").textContent = a.name;
    $("#asset-level").replaceChildren(HW.levelBadge(asset.alarm_summary.level));
    $("#asset-where").textContent = `${a.site} › ${a.area} · ${HW.kindWords(a.kind)} · `
      + "nominal shaft speed "
      + `${a.nominal_speed_hz} Hz (${Math.round(a.nominal_speed_hz * 60)} r/min) · ${HW.speedMeaning(a)} · `
      + `ISO 20816 group ${a.machine_group}, ${a.foundation} support · times in ${tz}`;
    const days = HW.param("days");
    if (days && [...$("#period").options].some((o) => o.value === days)) $("#period").value = days;
    const sel = $("#point-select");
    sel.replaceChildren(...asset.points.map((p) => el("option", { value: p.id },
      `${p.name} (${p.state.replace(/-/g, " ")})`)));
    const wanted = Number(HW.param("point"))
      || (asset.points.find((p) => p.records > 0) || asset.points[0] || {}).id;
    sel.value = wanted;
    renderAlarms();
    loadHistory();
    if (asset.points.length) await selectPoint(Number(sel.value));
  }

  document.addEventListener("DOMContentLoaded", () => {
    $("#point-select").addEventListener("change", (e) => selectPoint(Number(e.target.value)));
    $("#period").addEventListener("change", (e) => {
      const custom = e.target.value === "custom";
      $("#start").disabled = !custom; $("#end").disabled = !custom;
      if (custom && !$("#start").value) {
        const days = Number(point.default_period ? point.default_period.days : 30);
        $("#start").value = isoDay(Date.now() - days * 86400e3); $("#end").value = isoDay(Date.now());
      }
      if (!custom) {
        const q = new URLSearchParams(location.search); q.set("days", e.target.value);
        history.replaceState(null, "", `?${q}`);
        selectPoint(point.id);
      }
    });
    $("#apply").addEventListener("click", () => loadSeries());
    load();
  });
})();
