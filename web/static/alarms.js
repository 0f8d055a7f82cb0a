/* Alarms: active / acknowledged / shelved / all open / history, filtered by site, machine and level.
   Engineers acknowledge (with a comment) or shelve (until a time, with a reason); others only read. */
"use strict";
(function () {
  const { el, $ } = HW;
  let view = "active", tree = null;
  const tz = HW.defaultTz();
  const names = { asset: {}, point: {} }, zones = {};
  const zoneOf = (siteId) => zones[siteId] || tz;

  function filters() {
    const q = new URLSearchParams();
    for (const [id, key] of [["#af-site", "site_id"], ["#af-asset", "asset_id"], ["#af-level",
      "level"]]) if ($(id).value) q.set(key, $(id).value);
    return q;
  }

  function ackForm(a) {
    const id = `ack-${a.id}`;
    return el("form", { class: "inline-form ack-form", "data-alarm-id": a.id, onsubmit: async (ev) => {
      ev.preventDefault();
      try {
        await HW.api(`/api/v1/alarms/${a.id}/acknowledge`, { method: "POST",
          json: { comment: ev.target.comment.value } });
        done(`Alarm ${a.id} acknowledged.`);
      } catch (e) { HW.showError("#alarms-error", e); }
    } }, el("div", {}, el("label", { for: id }, "Comment"), el("input", { id, name: "comment", required: true,
      placeholder: "what is being done" })),
    el("button", { type: "submit", class: "primary" }, "Acknowledge"));
  }

  function shelveForm(a) {
    const id = `shelve-${a.id}`;
    const tz = zoneOf(a.site_id);
    const later = HW.wall(new Date(Date.now() + 7 * 86400e3).toISOString(), tz).slice(0, 16).replace(" ", "T");
    return el("form", { class: "inline-form shelve-form", onsubmit: async (ev) => {
      ev.preventDefault();
      try {
        await HW.api(`/api/v1/alarms/${a.id}/shelve`, { method: "POST",
          json: { until: HW.fromWall(ev.target.until.value, tz), reason: ev.target.reason.value } });
        done(`Alarm ${a.id} shelved.`);
      } catch (e) { HW.showError("#alarms-error", e); }
    } }, el("div", {}, el("label", { for: id + "-until" }, `Until (${tz})`), el("input", { id: id + "-until",
      name: "until", type: "datetime-local", value: later, required: true })),
    el("div", {}, el("label", { for: id }, "Reason"), el("input", { id, name: "reason", required: true,
      placeholder: "why it may wait" })),
    el("button", { type: "submit", class: "warn" }, "Shelve"));
  }

  function unshelveButton(a) {
    return el("button", { type: "button", onclick: async () => {
      try { await HW.api(`/api/v1/alarms/${a.id}/unshelve`,
        { method: "POST" }); done(`Alarm ${a.id} back from the shelf.`); }
      catch (e) { HW.showError("#alarms-error", e); }
    } }, "Unshelve");
  }

  function done(msg) { const b = $("#alarms-done"); b.hidden = false; b.textContent = msg; $("#alarms-error").hidden = true; load(); }

  function state(a) {
    const tz = zoneOf(a.site_id);
    if (a.shelved) return `shelved until ${HW.when(a.shelved_until, tz)}: ${a.shelve_reason || ""}`;
    if (a.acknowledged) return `acknowledged by ${a.acked_by} ${HW.when(a.acked_at, tz)}: ${a.ack_comment || ""}`;
    return "active";
  }

  async function loadOpen() {
    const q = filters(); q.set("view", view);
    const d = await HW.api(`/api/v1/alarms?${q}`);
    const body = $("#alarm-table tbody");
    body.replaceChildren(...d.alarms.map((a) => el("tr", { "data-alarm-id": a.id, class: `alarm-row lvl-${a.level}` },
      el("td", {}, HW.levelBadge(a.level)), el("td", {}, el("a", { href: `/assets/${a.asset_id}?point=${a.point_id}` },
        a.asset)),
      el("td", {}, a.point), el("td", {}, a.rule), el("td", {}, `${HW.num(a.value)} ${a.unit}`),
      el("td", {}, HW.when(a.since, zoneOf(a.site_id))), el("td", { class: "alarm-state" }, state(a)),
      el("td", {}, HW.may("engineer") ? [a.shelved ? unshelveButton(a) : null,
        !a.acknowledged && !a.shelved ? ackForm(a) : null, !a.shelved ? shelveForm(a) : null]
        : el("span", { class: "muted" }, "engineers acknowledge"), a.record_id ? el("a",
          { href: `/records/${a.record_id}` }, "reading") : null))));
    if (!d.alarms.length) body.append(el("tr", {}, el("td", { colspan: 8 },
      `No ${view === "all" ? "open" : view} alarm.`)));
  }

  async function loadHistory() {
    const q = filters();
    const d = await HW.api(`/api/v1/alarms/history?${q}&limit=200`);
    $("#history-table tbody").replaceChildren(...d.events.map((e) => el("tr", {},
      el("td", {}, HW.when(e.created_at, zoneOf(e.site_id))), el("td", {}, e.kind), el("td", {},
        names.asset[e.asset_id] || e.asset_id),
      el("td", {}, names.point[e.point_id] || e.point_id),
      el("td", {}, e.to_level ? HW.levelBadge(e.to_level) : "", " ", e.summary || e.metric || ""), el("td", {},
        e.actor), el("td", {}, e.comment || ""))));
  }

  async function load() {
    $("#open-section").hidden = view === "history";
    $("#history-section").hidden = view !== "history";
    try { await (view === "history" ? loadHistory() : loadOpen()); document.body.dataset.ready = "1"; }
    catch (e) { HW.showError("#alarms-error", e); }
  }

  async function init() {
    let sites;
    try { [tree, sites] = await Promise.all([HW.api("/api/v1/tree"), HW.api("/api/v1/dashboard/sites")]); }
    catch (e) { HW.showError("#alarms-error", e); return; }
    for (const s of sites.sites) zones[s.id] = s.timezone;
    for (const s of tree.sites) {
      $("#af-site").append(el("option", { value: s.id }, s.name));
      for (const ar of s.areas) for (const a of ar.assets) {
        names.asset[a.id] = a.name;
        for (const p of a.points) names.point[p.id] = p.name;
        $("#af-asset").append(el("option", { value: a.id }, `${a.name} (${s.name})`));
      }
    }
    const all = [...new Set(sites.sites.map((s) => s.timezone))];
    $("#alarms-tz").textContent = `times in ${all.length === 1 ? all[0] : "each site's zone: " + sites.sites.map((s) => `${s.name} ${s.timezone}`).join(", ")}`;
    for (const b of document.querySelectorAll("[role=tab]")) b.addEventListener("click", () => {
      view = b.dataset.view;
      for (const o of document.querySelectorAll("[role=tab]")) o.setAttribute("aria-selected", String(o === b));
      load();
    });
    for (const id of ["#af-site", "#af-asset", "#af-level"]) $(id).addEventListener("change", load);
    load();
  }
  document.addEventListener("DOMContentLoaded", init);
})();
