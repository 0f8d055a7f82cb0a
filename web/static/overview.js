/* Plant overview: sites > areas > machines with the worst alarm level, last reading, a small half-order
   trend and alarm counts; filters; route points due or overdue. */
"use strict";
(function () {
  const { el, $ } = HW;
  let data = null;
  const RANK = { normal: 0, alert: 1, danger: 2 };

  function spark(id, values, days) {
    const n = values.length;
    const x = values.map((_, i) => -days + (i + 0.5) * days / n);
    return HW.plot(id, [{ x, y: values, type: "scatter", mode: "lines+markers", line: { color: HW.palette.half, width: 1.5 },
      marker: { size: 3 }, connectgaps: false, name: "half-order", hovertemplate: "%{y:.3g} mm/s<extra></extra>" }], {
      margin: { l: 40, r: 6, t: 4, b: 30 }, showlegend: false, height: 92,
      xaxis: { title: { text: "days", standoff: 2 }, range: [-days, 0], tickfont: { size: 9 }, dtick: 10 },
      yaxis: { title: { text: "mm/s", standoff: 2 }, rangemode: "tozero", tickfont: { size: 9 }, nticks: 3 },
    }, { displayModeBar: false, staticPlot: true });
  }

  function matches(asset, area, site) {
    const q = $("#f-search").value.trim().toLowerCase();
    const lvl = $("#f-level").value;
    const siteSel = $("#f-site").value;
    if (siteSel && String(site.id) !== siteSel) return false;
    if (q) {
      const hay = [asset.name, area.name, site.name, asset.kind, ...asset.points.map((p) => p.name)].join(" ").toLowerCase();
      if (!hay.includes(q)) return false;
    }
    const level = asset.alarms.level;
    if (lvl === "danger" && level !== "danger") return false;
    if (lvl === "alert" && RANK[level] < 1) return false;
    if (lvl === "normal" && level !== "normal") return false;
    if ($("#f-stale").checked) {
      const t = asset.last_measured_at ? new Date(asset.last_measured_at) : null;
      if (t && (new Date(data.now) - t) < 7 * 86400e3) return false;
    }
    return true;
  }

  function assetCard(asset, site) {
    const a = asset.alarms;
    const id = `spark-${asset.id}`;
    const card = el("article", { class: `machine lvl-${a.level}`, "data-asset-id": asset.id, "data-level": a.level },
      el("h4", {}, el("a", { href: `/assets/${asset.id}` }, asset.name)),
      el("p", { class: "kind" }, asset.kind.replace(/_/g, " "), ` · ${asset.points.length} point${asset.points.length === 1 ? "" : "s"}`),
      el("div", { class: "machine-state" }, HW.levelBadge(a.level), " ", HW.zoneBadge(asset.zone)),
      el("dl", { class: "facts" },
        el("dt", {}, "Last reading"), el("dd", { title: HW.when(asset.last_measured_at, site.timezone) + " " + site.timezone }, HW.age(asset.last_measured_at, data.now)),
        el("dt", {}, "Alarms"), el("dd", { class: "alarm-counts" },
          el("span", { title: "active (not acknowledged)" }, `${a.active} active`), " · ",
          el("span", {}, `${a.acknowledged} ack.`), " · ", el("span", {}, `${a.shelved} shelved`))),
      el("div", { class: "spark", id, "data-label": `half-order velocity of ${asset.name}, last 30 days` }));
    return card;
  }

  function render() {
    const root = $("#plant");
    root.replaceChildren();
    const pending = [];
    let shown = 0;
    for (const site of data.sites) {
      const siteBox = el("section", { class: "site", "aria-label": site.name },
        el("h2", {}, site.name, el("span", { class: "muted tz" }, ` · times in ${site.timezone}`)));
      for (const area of site.areas) {
        const assets = area.assets.filter((a) => matches(a, area, site));
        if (!assets.length) continue;
        assets.sort((x, y) => RANK[y.alarms.level] - RANK[x.alarms.level] || x.name.localeCompare(y.name));
        const grid = el("div", { class: "machines" }, assets.map((a) => assetCard(a, site)));
        siteBox.append(el("h3", {}, area.name), grid);
        for (const a of assets) pending.push([a, site]);
        shown += assets.length;
      }
      if (siteBox.children.length > 1) root.append(siteBox);
    }
    if (!shown) root.append(el("p", { class: "muted card", id: "no-match" }, "No machine matches the filters."));
    for (const [a] of pending) spark(`spark-${a.id}`, a.spark.length ? a.spark : [null], data.spark_days);
  }

  function renderDue() {
    const body = $("#due-table tbody");
    body.replaceChildren();
    const zoneOfSite = Object.fromEntries(data.sites.map((s) => [s.id, s.timezone]));
    const zoneOfRoute = Object.fromEntries(data.routes.map((r) => [r.id, zoneOfSite[r.site_id] || HW.defaultTz()]));
    for (const st of data.due_points) {
      const tz = zoneOfRoute[st.route_id];
      body.append(el("tr", { class: `due-${st.status}` },
        el("td", {}, el("span", { class: `due due-${st.status}` }, st.status === "overdue" ? "⏰ overdue" : "◷ due")),
        el("td", {}, el("a", { href: `/routes#route-${st.route_id}` }, st.route)), el("td", {}, st.asset),
        el("td", {}, st.point), el("td", {}, HW.when(st.last_measured_at, tz)), el("td", {}, HW.when(st.due_at, tz))));
    }
    $("#due-none").hidden = data.due_points.length > 0;
    $("#due-table").hidden = data.due_points.length === 0;
  }

  async function load() {
    try {
      data = await HW.api("/api/v1/dashboard/overview");
    } catch (err) { HW.showError("#overview-error", err); return; }
    const sel = $("#f-site");
    if (sel.options.length === 1) for (const s of data.sites) sel.append(el("option", { value: s.id }, s.name));
    $("#as-of").textContent = `As of ${HW.when(data.now, HW.defaultTz())} (${HW.defaultTz()})`;
    render();
    renderDue();
    document.body.dataset.ready = "1";
  }
  for (const id of ["#f-search", "#f-level", "#f-site", "#f-stale"]) {
    document.addEventListener("DOMContentLoaded", () => $(id).addEventListener("input", () => data && render()));
  }
  document.addEventListener("DOMContentLoaded", () => $("#filters").addEventListener("submit", (e) => e.preventDefault()));
  document.addEventListener("DOMContentLoaded", load);
})();
