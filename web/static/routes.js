/* Routes for technicians (tablet-friendly): each route's points in walking order with due/overdue status;
   upload a reading per point (file, units, speed) or the whole route as a ZIP; each reading's analysis
   result appears as soon as the worker has it. */
"use strict";
(function () {
  const { el, $ } = HW;
  let tz = HW.defaultTz();
  let pointInfo = {}, assetInfo = {}, now = null;

  /* The reading schedule of a stop in words, with how long it is overdue or how long until it is due. */
  function schedule(st) {
    const span = (ms) => {
      const h = Math.abs(ms) / 3600e3;
      return h < 48 ? `${Math.round(h)} h` : `${Math.floor(h / 24)} days`;
    };
    if (!st.due_at) return { text: "no reading yet: due now", cls: "due" };
    const late = now - new Date(st.due_at);
    if (st.status === "overdue") {
      return { text: `overdue by ${span(late)} (was due ${HW.when(st.due_at, tz)})`, cls: "overdue" };
    }
    if (st.status === "due") return { text: `due now (since ${span(late)})`, cls: "due" };
    return { text: `on schedule: next reading due in ${span(late)}`, cls: "ok" };
  }

  /* The condition of the stop's machine (worst alarm level) and of the point's latest reading (ISO zone). */
  function condition(st) {
    const p = pointInfo[st.point_id] || {}, a = assetInfo[p.asset_id] || {};
    const level = (a.alarms || {}).level || "normal";
    const zone = p.latest ? p.latest.zone : null;
    return el("span", { class: "condition", "data-level": level, "data-zone": zone || "" },
      "machine ", HW.levelBadge(level), " · last reading ", zone ? HW.zoneBadge(zone) : "no zone");
  }
  const LEVEL_OF_ZONE = { A: "normal", B: "normal", C: "alert", D: "danger" };

  function resultBox(box, detail) {
    const r = detail.result;
    const rec = detail.record;
    box.replaceChildren();
    if (!r) {
      const j = detail.job || {};
      box.append(el("p", { class: j.state === "failed" ? "error" : "notice" },
        j.state === "failed" ? `Stored, but the analysis failed: ${j.error}`
          : `Stored as reading ${rec.id}; analysis ${j.state || "queued"}…`));
      return j.state !== "failed";
    }
    const s = r.subharmonic || {}, o = r.overall || {};
    // the box takes the colour of what the reading says, never a green box around zone D
    const worst = [LEVEL_OF_ZONE[o.zone] || "normal", s.detected ? "alert" : "normal"]
      .sort((x, y) => ["normal", "alert", "danger"].indexOf(y) - ["normal", "alert", "danger"].indexOf(x))[0];
    box.append(el("div", { class: `result-ready cond cond-${worst}`, "data-record-id": rec.id,
      "data-condition": worst },
      el("strong", {},
        s.detected ? `${s.class} line at ${HW.num(s.frequency_hz, 4)} Hz (${HW.num(s.order, 3)}X), `
          + `${HW.num(s.velocity_rms_mm_s)} mm/s r.m.s.`
        : "No subharmonic line found"),
      el("br"), `Overall ${HW.num(o.velocity_rms_mm_s)} mm/s r.m.s. `, HW.zoneBadge(o.zone),
      ` · forcing ${HW.num((r.forcing || {}).frequency_hz, 4)} Hz · `,
      el("a", { href: `/records/${rec.id}` },
        "open reading")));
    return false;
  }

  async function follow(box, recordId) {
    for (let i = 0; i < 120; i++) {
      const d = await HW.api(`/api/v1/records/${recordId}`);
      if (!resultBox(box, d)) return;
      await new Promise((res) => setTimeout(res, 1000));
    }
  }

  function stopForm(stop) {
    const p = pointInfo[stop.point_id] || {};
    const base = `up-${stop.point_id}`;
    const zone = tz;  // the site zone of this stop's route
    const now = HW.wall(new Date().toISOString(), zone).slice(0, 16);  // "YYYY-MM-DD HH:MM", 24-hour
    const box = el("div", { class: "stop-result", "aria-live": "polite" });
    const form = el("form", { class: "inline-form stop-upload", "data-point-id": stop.point_id,
      novalidate: true,
      onsubmit: async (ev) => {
      ev.preventDefault();
      const f = ev.target;
      const fd = new FormData();
      if (!f.file.files.length) { HW.showError(box, new HW.ApiError(0, "invalid",
        "choose the reading's file first",
        "file")); return; }
      fd.append("file", f.file.files[0]);
      fd.append("units", f.units.value);
      if (f.speed.value) { fd.append("speed_hz", f.speed.value); fd.append("speed_source", "technician"); }
      const when = f.measured.value.trim();
      if (!/^\d{4}-\d{2}-\d{2}[ T]\d{2}:\d{2}$/.test(when)) {
        HW.showError(box, new HW.ApiError(0, "invalid", "give the time as YYYY-MM-DD HH:MM (24-hour)",
          "measured_at"));
        return;
      }
      fd.append("measured_at", HW.fromWall(when.replace(" ", "T"), zone));
      f.querySelector("button").disabled = true;
      try {
        const out = await HW.api(`/api/v1/points/${stop.point_id}/records/file`, { method: "POST",
          form: fd });
        box.replaceChildren(el("p", { class: "notice" },
          `Stored as reading ${out.record_id}; waiting for the analysis…`));
        await follow(box, out.record_id);
      } catch (e) { box.replaceChildren(el("p", { class: "error" })); HW.showError(box.firstChild, e); }
      finally { f.querySelector("button").disabled = false; }
    } },
    el("div", {}, el("label", { for: `${base}-file` }, "Reading file"), el("input", { id: `${base}-file`,
      name: "file",
      type: "file", accept: ".wav,.csv,.uff,.unv" })),
    el("div", {}, el("label", { for: `${base}-units` }, "Units"), el("select", { id: `${base}-units`,
      name: "units" },
      ["m/s2", "g", "mm/s2"].map((u) => el("option", { value: u, selected: u === (p.units || "m/s2") }, u)))),
    el("div", {}, el("label", { for: `${base}-speed` }, "Shaft speed (Hz)"), el("input",
      { id: `${base}-speed`,
      name: "speed", type: "number", step: "0.01", min: "0", inputmode: "decimal", placeholder: "rev/s",
      "aria-describedby": `${base}-speed-help` }),
    el("p", { class: "help", id: `${base}-speed-help` }, speedHelp(p))),
    el("div", {}, el("label", { for: `${base}-when` }, `Measured (${zone})`), el("input",
      { id: `${base}-when`,
      name: "measured", type: "text", value: now, inputmode: "numeric", size: 16, maxlength: 16,
      pattern: "\\d{4}-\\d{2}-\\d{2}[ T]\\d{2}:\\d{2}", placeholder: "YYYY-MM-DD HH:MM",
      autocomplete: "off" })),
    el("button", { type: "submit", class: "primary" }, "Upload reading"));
    return [form, box];
  }

  function speedHelp(p) {
    const a = assetInfo[p.asset_id];
    return a ? `${HW.speedMeaning(a)}. Enter the shaft speed in rev/s (r/min ÷ 60).`
      : "shaft speed in rev/s";
  }

  function zipForm(route) {
    const id = `zip-${route.id}`;
    const box = el("div", { class: "zip-report", "aria-live": "polite" });
    const form = el("form", { class: "inline-form", onsubmit: async (ev) => {
      ev.preventDefault();
      const input = ev.target.zip;
      if (!input.files.length) { HW.showError(box, new HW.ApiError(0, "invalid", "choose the route ZIP first",
        "file")); return; }
      const fd = new FormData(); fd.append("file", input.files[0]);
      try {
        const rep = await HW.api(`/api/v1/routes/${route.id}/uploads`, { method: "POST", form: fd });
        box.replaceChildren(el("p", { class: "notice" },
          `${rep.accepted} accepted, ${rep.duplicate} already stored, ${rep.rejected} rejected.`),
          el("table", { class: "grid" }, el("thead", {}, el("tr", {}, ["Row", "Point", "File", "Status",
            "Result"].map((h) => el("th", { scope: "col" }, h)))),
            el("tbody", {}, rep.rows.map((r) => {
              const cell = el("td", {});
              if (r.record_id) follow(cell, r.record_id);
              return el("tr", {}, el("td", {}, r.row), el("td", {}, r.point), el("td", {}, r.file),
                el("td", {}, r.status === "rejected" ? `rejected: ${r.error.message}` : r.status), cell);
            }))));
      } catch (e) { HW.showError(box, e); }
    } }, el("div", {}, el("label", { for: id }, "Whole route as ZIP"), el("input", { id, name: "zip",
      type: "file",
      accept: ".zip" })),
    el("button", { type: "submit" }, "Upload ZIP"));
    return [form, box];
  }

  async function load() {
    let d, tree, sites;
    try { [d, tree, sites] = await Promise.all([HW.api("/api/v1/routes"),
      HW.api("/api/v1/dashboard/overview"),
      HW.api("/api/v1/dashboard/sites")]); }
    catch (e) { HW.showError("#routes-error", e); return; }
    now = new Date(d.now || tree.now || Date.now());
    const zones = Object.fromEntries(sites.sites.map((s) => [s.id, s.timezone]));
    for (const s of tree.sites) for (const ar of s.areas) for (const a of ar.assets) {
      assetInfo[a.id] = a;
      for (const p of a.points) pointInfo[p.id] = Object.assign({ asset_id: a.id }, p);
    }
    $("#routes-tz").textContent = "times in each route's site zone";
    const root = $("#routes");
    root.replaceChildren(...d.routes.map((r) => (tz = zones[r.site_id] || HW.defaultTz()) && el("section",
      { class: "card route", id: `route-${r.id}`, "data-timezone": tz },
      el("h2", {}, r.name, el("span", { class: "muted" },
        ` · ${r.counts.overdue} overdue, ${r.counts.due} due, ${r.counts.ok} on schedule`
          + ` · times in ${tz}`)),
      HW.may("technician") ? zipForm(r) : null,
      r.stops.map((st) => el("div", { class: `stop due-${st.status}`, "data-point-id": st.point_id },
        el("div", { class: "pos", "aria-label": `stop ${st.position + 1}` }, st.position + 1),
        el("div", {}, el("h3", {}, el("a", { href: `/assets/${(pointInfo[st.point_id] || {}).asset_id}`
            + `?point=${st.point_id}` }, `${st.asset} · ${st.point}`)),
          el("p", { class: "stop-state" }, condition(st), " · ",
            el("span", { class: `due due-${schedule(st).cls}`, "data-status": st.status },
              HW.icon(st.status ===
              "ok" ? "normal" : "clock"), " ", schedule(st).text)),
          el("p", { class: "muted" }, `every ${HW.num(st.due_interval_h / 24, 3)} days · last reading `
            + `${HW.when(st.last_measured_at, tz)} · due ${HW.when(st.due_at, tz)}`),
          HW.may("technician") ? stopForm(st) : null))))));
    if (!d.routes.length) root.append(el("p", { class: "muted" }, "No route is defined yet."));
    document.body.dataset.ready = "1";
  }
  document.addEventListener("DOMContentLoaded", load);
})();
