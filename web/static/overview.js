/* Plant overview, worst first: a summary strip (machines in danger / alert / stale), then per site the
   areas ordered by their worst level and, inside an area, machines by level, staleness and name. Each card
   has the worst alarm level, ISO zone, staleness (no reading for longer than the point's interval) and a
   30-day half-order sparkline in the alarm rule's own measure (mm/s r.m.s.) with its alert and danger
   lines; route points due or overdue below. */
"use strict";
(function () {
  const { el, $ } = HW;
  let data = null;
  const RANK = { normal: 0, alert: 1, danger: 2 };
  const WORD = { danger: "in danger", alert: "in alert", stale: "stale", normal: "normal" };

  /* The spark in mm/s r.m.s. (the half-order rule's measure). */
  function sparkValues(asset) {
    if (asset.spark_half_order_velocity_rms_mm_s) return asset.spark_half_order_velocity_rms_mm_s;
    // peak -> r.m.s. of a sine
    return (asset.spark || []).map((v) => (v === null || v === undefined ? null : v / Math.SQRT2));
  }

  function spark(id, asset, days) {
    const values = sparkValues(asset);
    const vals = values.length ? values : [null];
    const n = vals.length;
    const x = vals.map((_, i) => -days + (i + 0.5) * days / n);
    const lv = asset.half_order_levels_rms_mm_s || {};
    const top = Math.max(0.05, ...vals.filter((v) => v !== null).map((v) => v * 1.15),
      (lv.danger || 0) * 1.12, (lv.alert || 0) * 1.12);
    const shapes = [], annotations = [];
    for (const [name, color] of [["alert", HW.palette.alert], ["danger", HW.palette.limit]]) {
      if (!lv[name]) continue;
      shapes.push({ type: "line", xref: "paper", x0: 0, x1: 1, y0: lv[name], y1: lv[name], line: { color,
        width: 1.2, dash: name === "alert" ? "dot" : "dash" } });
      annotations.push({ xref: "paper", x: 0.01, xanchor: "left", y: lv[name], yanchor: "bottom",
        text: `${name} ${HW.num(lv[name], 2)}`,
        showarrow: false, font: { size: 9, color } });
    }
    return HW.plot(id, [{ x, y: vals, type: "scatter", mode: "lines+markers", line: { color: HW.palette.half,
      width: 1.5 },
      marker: { size: 3 }, connectgaps: false, name: "half-order r.m.s.",
        hovertemplate: "%{y:.2f} mm/s r.m.s.<extra></extra>" }], {
      margin: { l: 44, r: 6, t: 4, b: 28 }, showlegend: false, height: 96, shapes, annotations,
      xaxis: { title: { text: "days", standoff: 2 }, range: [-days, 0], tickfont: { size: 9 }, dtick: 10 },
      yaxis: { title: { text: "mm/s r.m.s.", standoff: 2, font: { size: 9 } }, range: [0, top],
        tickfont: { size: 9 }, nticks: 3 },
    }, { displayModeBar: false, staticPlot: true });
  }

  function stale(asset) { return Boolean(asset.staleness && asset.staleness.stale); }

  function matches(asset, area, site) {
    const q = $("#f-search").value.trim().toLowerCase();
    const lvl = $("#f-level").value;
    const siteSel = $("#f-site").value;
    if (siteSel && String(site.id) !== siteSel) return false;
    if (q) {
      const hay = [asset.name, area.name, site.name, asset.kind,
        ...asset.points.map((p) => p.name)].join(" ").toLowerCase();
      if (!hay.includes(q)) return false;
    }
    const level = asset.alarms.level;
    if (lvl === "danger" && level !== "danger") return false;
    if (lvl === "alert" && RANK[level] < 1) return false;
    if (lvl === "normal" && level !== "normal") return false;
    if ($("#f-stale").checked && !stale(asset)) return false;
    return true;
  }

  function interval(h) { return h >= 48 ? `${HW.num(h / 24, 2)} d` : `${HW.num(h, 2)} h`; }

  function staleBadge(asset) {
    if (!stale(asset)) return null;
    const st = asset.staleness;
    const days = st.days_since_reading;
    const later = (a, b) => ((b.days_since_reading ?? 1e9) > (a.days_since_reading ?? 1e9) ? b : a);
    const worst = st.points.reduce(later, st.points[0]);
    const text = days === null ? "stale · no reading yet" : `stale · no reading for ${HW.num(days, 2)} d`;
    return el("span", { class: "stale-badge",
      title: `${st.points.length} point(s) without a reading for longer than the interval `
        + `(${worst.point}: every ${interval(worst.interval_h)})` },
      HW.icon("clock"), " ", text);
  }

  function assetCard(asset, site) {
    const a = asset.alarms;
    const id = `spark-${asset.id}`;
    const kind = asset.kind.replace(/_/g, " ");
    return el("article", { class: `machine lvl-${a.level}${stale(asset) ? " is-stale" : ""}`,
      "data-asset-id": asset.id, "data-level": a.level,
      "data-stale": stale(asset) ? "1" : "0",
        "aria-label": `${asset.name}: ${a.level}${stale(asset) ? ", stale" : ""}` },
      el("h4", {}, el("a", { href: `/assets/${asset.id}` }, asset.name)),
      el("p", { class: "kind" }, kind,
        ` · ${asset.points.length} point${asset.points.length === 1 ? "" : "s"}`),
      el("div", { class: "machine-state" }, HW.levelBadge(a.level), " ", HW.zoneBadge(asset.zone), " ",
        staleBadge(asset)),
      el("dl", { class: "facts" },
        el("dt", {}, "Last reading"), el("dd", { title: HW.when(asset.last_measured_at,
          site.timezone) + " " + site.timezone }, HW.age(asset.last_measured_at, data.now)),
        el("dt", {}, "Alarms"), el("dd", { class: "alarm-counts" },
          el("span", { title: "active (not acknowledged)" }, `${a.active} active`), " · ",
          el("span", {}, `${a.acknowledged} ack.`), " · ", el("span", {}, `${a.shelved} shelved`))),
      el("div", { class: "spark", id,
        "data-label": `half-order velocity r.m.s. of ${asset.name}, last ${data.spark_days} days, in mm/s, `
          + "with its alert and danger levels" }));
  }

  function renderSummary() {
    const s = data.summary || {};
    const box = $("#plant-summary");
    const item = (key, icon) => el("button", { type: "button",
      class: `sum sum-${key}${s[key] ? "" : " zero"}`, "data-count": s[key] || 0, "data-key": key,
      title: `show only the machines ${WORD[key]}`, onclick: () => {
        $("#f-level").value = key === "danger" || key === "alert" ? key : (key === "normal" ? "normal" : "");
        $("#f-stale").checked = key === "stale";
        render();
      } }, HW.icon(icon), el("strong", {}, String(s[key] || 0)), ` ${WORD[key]}`);
    box.replaceChildren(item("danger", "danger"), item("alert", "alert"), item("stale", "clock"),
      item("normal", "normal"),
      el("span", { class: "muted sum-total" }, `of ${s.machines || 0} machines`),
      el("button", { type: "button", class: "linklike dark", id: "sum-all", onclick: () => {
        $("#f-level").value = ""; $("#f-stale").checked = false; $("#f-search").value = ""; render();
      } }, "show all"));
  }

  function assetKey(a) { return [-RANK[a.alarms.level], stale(a) ? 0 : 1, a.name.toLowerCase()]; }
  function cmp(x, y) {
    for (let i = 0; i < x.length; i++) { if (x[i] < y[i]) return -1; if (x[i] > y[i]) return 1; }
    return 0;
  }

  function render() {
    const root = $("#plant");
    root.replaceChildren();
    const pending = [];
    let shown = 0;
    const sites = data.sites.map((site) => {
      const areas = site.areas.map((area) => ({ area,
        assets: area.assets.filter((a) => matches(a, area, site))
          .sort((x, y) => cmp(assetKey(x), assetKey(y))) }))
        .filter((g) => g.assets.length);
      const worst = (g) => Math.max(...g.assets.map((a) => RANK[a.alarms.level]));
      const nWorst = (g) => g.assets.filter((a) => RANK[a.alarms.level] === worst(g)).length;
      areas.sort((p, q) => cmp([-worst(p), -nWorst(p), p.area.name.toLowerCase()], [-worst(q), -nWorst(q),
        q.area.name.toLowerCase()]));
      return { site, areas, worst: Math.max(-1, ...areas.map(worst)) };
    }).filter((x) => x.areas.length);
    sites.sort((p, q) => q.worst - p.worst || p.site.name.localeCompare(q.site.name));
    for (const { site, areas } of sites) {
      const siteBox = el("section", { class: "site", "aria-label": site.name },
        el("h2", {}, site.name, el("span", { class: "muted tz" }, ` · times in ${site.timezone}`)));
      for (const { area, assets } of areas) {
        const counts = ["danger", "alert"].map((l) => [l,
          assets.filter((a) => a.alarms.level === l).length]).filter(([, n]) => n);
        siteBox.append(el("h3", { class: "area-head", "data-area-id": area.id }, area.name,
          counts.length ? el("span", { class: "muted area-count" },
            ` · ${counts.map(([l, n]) => `${n} ${l}`).join(", ")}`) : null),
        el("div", { class: "machines" }, assets.map((a) => assetCard(a, site))));
        for (const a of assets) pending.push(a);
        shown += assets.length;
      }
      root.append(siteBox);
    }
    if (!shown) root.append(el("p", { class: "muted card", id: "no-match" },
      "No machine matches the filters."));
    for (const a of pending) spark(`spark-${a.id}`, a, data.spark_days);
  }

  function renderDue() {
    const body = $("#due-table tbody");
    body.replaceChildren();
    const zoneOfSite = Object.fromEntries(data.sites.map((s) => [s.id, s.timezone]));
    const zoneOfRoute = Object.fromEntries(data.routes.map((r) => [r.id,
      zoneOfSite[r.site_id] || HW.defaultTz()]));
    const first = (x, y) => (x.status === y.status ? 0 : x.status === "overdue" ? -1 : 1);
    const rows = [...data.due_points].sort(first);
    for (const st of rows) {
      const tz = zoneOfRoute[st.route_id];
      const late = st.due_at ? (new Date(data.now) - new Date(st.due_at)) / 86400e3 : null;
      body.append(el("tr", { class: `due-${st.status}` },
        el("td", {}, el("span", { class: `due due-${st.status}` }, HW.icon("clock"),
          st.status === "overdue" ? " overdue" : " due")),
        el("td", { class: "num" }, late === null ? "never read" : `${HW.num(Math.max(0, late), 2)} d`),
        el("td", {}, el("a", { href: `/routes#route-${st.route_id}` }, st.route)), el("td", {}, st.asset),
        el("td", {}, st.point), el("td", {}, HW.when(st.last_measured_at, tz)), el("td", {},
          HW.when(st.due_at, tz))));
    }
    $("#due-none").hidden = data.due_points.length > 0;
    $("#due-table").hidden = data.due_points.length === 0;
  }

  async function load() {
    const t0 = performance.now();
    try {
      data = await HW.api("/api/v1/dashboard/overview");
    } catch (err) { HW.showError("#overview-error", err); return; }
    const sel = $("#f-site");
    if (sel.options.length === 1) for (const s of data.sites) sel.append(el("option", { value: s.id },
      s.name));
    $("#as-of").textContent = `As of ${HW.when(data.now, HW.defaultTz())} (${HW.defaultTz()})`;
    renderSummary();
    render();
    renderDue();
    document.body.dataset.renderMs = String(Math.round(performance.now() - t0));
    document.body.dataset.ready = "1";
  }
  for (const id of ["#f-search", "#f-level", "#f-site", "#f-stale"]) {
    document.addEventListener("DOMContentLoaded", () => $(id).addEventListener("input",
      () => data && render()));
  }
  document.addEventListener("DOMContentLoaded", () => $("#filters").addEventListener("submit",
    (e) => e.preventDefault()));
  document.addEventListener("DOMContentLoaded", load);
})();
