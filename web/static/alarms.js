/* Alarms: one incident per machine (worst first) with its rules beneath; active / acknowledged / shelved /
   all open / history, filtered by site, machine and level. Engineers acknowledge (with a comment) or shelve
   (until a time, with a reason) a whole incident or one rule, in one compact dialog; others only read. */
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

  /* ---- the compact dialog: one for every action, on an incident (a machine) or on one rule ---- */
  let pending = null;
  const WORD = { acknowledge: "Acknowledge", shelve: "Shelve", unshelve: "Unshelve" };
  const LEVEL = { alert: "ALERT", danger: "DANGER" };
  function ruleName(r) { return `${r.asset} / ${r.point} — ${r.rule} (${LEVEL[r.level] || r.level})`; }
  function machineName(inc) {
    const n = inc.rules.length;
    return `${inc.asset} (${LEVEL[inc.level] || inc.level}, ${n} rule${n === 1 ? "" : "s"})`;
  }

  function openDialog(action, target) {
    const tz = zoneOf(target.site_id);
    pending = { action, target, tz };
    $("#dlg-title").textContent = `${WORD[action]} ${target.rules ? "every open alarm of a machine" : "one alarm"}`;
    $("#dlg-what").textContent = target.rules ? machineName(target) : ruleName(target);
    $("#dlg-comment-row").hidden = action !== "acknowledge";
    $("#dlg-until-row").hidden = $("#dlg-reason-row").hidden = action !== "shelve";
    $("#dlg-tz").textContent = tz;
    $("#dlg-comment").value = $("#dlg-reason").value = "";
    $("#dlg-until").value = HW.wall(new Date(Date.now() + 7 * 86400e3).toISOString(), tz).slice(0, 16);
    $("#dlg-error").hidden = true;
    $("#dlg-ok").textContent = WORD[action];
    $("#alarm-dialog").showModal();
    (action === "acknowledge" ? $("#dlg-comment") : action === "shelve" ? $("#dlg-until") : $("#dlg-ok")).focus();
  }

  async function confirmDialog(ev) {
    ev.preventDefault();
    const { action, target, tz } = pending;
    const path = target.rules ? `/api/v1/alarms/incidents/${target.asset_id}/${action}`
      : `/api/v1/alarms/${target.id}/${action}`;
    let json;
    if (action === "acknowledge") json = { comment: $("#dlg-comment").value };
    if (action === "shelve") {
      const until = $("#dlg-until").value.trim();
      if (!/^\d{4}-\d{2}-\d{2} \d{2}:\d{2}$/.test(until)) {
        HW.showError("#dlg-error", new HW.ApiError(0, "invalid", "until: give the end as YYYY-MM-DD HH:MM (24-hour)",
          "until"));
        return;
      }
      json = { until: HW.fromWall(until.replace(" ", "T"), tz), reason: $("#dlg-reason").value };
    }
    try {
      await HW.api(path, { method: "POST", json });
    } catch (e) { HW.showError("#dlg-error", e); return; }
    $("#alarm-dialog").close();
    const what = target.rules ? machineName(target) : ruleName(target);
    const done_ = { acknowledge: "Acknowledged", shelve: "Shelved", unshelve: "Back from the shelf" }[action];
    const until = action === "shelve" ? ` until ${$("#dlg-until").value} (${tz})` : "";
    done(`${done_}: ${what}${until}.`);
  }

  function actionButtons(target, shelved, acknowledged) {
    if (!HW.may("engineer")) return null;
    const label = target.rules ? target.asset : ruleName(target);
    const b = (action, cls) => el("button", { type: "button", class: `small ${cls || ""}`, "data-action": action,
      "aria-label": `${WORD[action]}: ${label}`, onclick: () => openDialog(action, target) }, `${WORD[action]}…`);
    return el("span", { class: "actions" }, !acknowledged && !shelved ? b("acknowledge", "primary") : null,
      shelved ? b("unshelve") : b("shelve", "warn"));
  }

  function done(msg) {
    const b = $("#alarms-done"); b.hidden = false; b.textContent = msg; $("#alarms-error").hidden = true; load();
  }

  function state(a) {
    const tz = zoneOf(a.site_id);
    if (a.shelved) return `shelved until ${HW.when(a.shelved_until, tz)}: ${a.shelve_reason || ""}`;
    if (a.acknowledged) return `acknowledged by ${a.acked_by} ${HW.when(a.acked_at, tz)}: ${a.ack_comment || ""}`;
    return "active";
  }

  function ruleRow(r) {
    return el("tr", { "data-alarm-id": r.id, class: `alarm-row lvl-${r.level}` },
      el("td", {}, HW.levelBadge(r.level)), el("td", {}, r.point), el("td", { class: "rule" }, r.rule),
      el("td", { class: "value" }, r.value_text || `${HW.num(r.value)} ${r.unit}`),
      el("td", {}, HW.when(r.since, zoneOf(r.site_id))), el("td", { class: "alarm-state" }, state(r)),
      el("td", {}, actionButtons(r, r.shelved, r.acknowledged),
        r.record_id ? el("a", { href: `/records/${r.record_id}`, class: "small-link" }, "reading") : null));
  }

  function incidentCard(inc) {
    const tz = zoneOf(inc.site_id);
    const n = inc.rules.length;
    const id = `incident-${inc.asset_id}`;
    return el("article", { class: `card incident lvl-${inc.level}`, "data-asset-id": inc.asset_id,
      "aria-labelledby": id },
    el("header", { class: "incident-head" },
      HW.levelBadge(inc.level),
      el("h2", { id }, el("a", { href: `/assets/${inc.asset_id}` }, inc.asset)),
      el("span", { class: "muted" }, `${inc.area} · ${n} rule${n === 1 ? "" : "s"} · opened ${HW.when(inc.opened_at, tz)}`
        + ` · ${inc.state}`),
      actionButtons(inc, inc.state === "shelved", inc.state !== "active")),
    inc.cause ? el("p", { class: "incident-cause" }, el("strong", {}, `Likely cause: ${inc.cause.title}`),
      ` — because ${inc.cause.why.join("; ")}. `, el("span", { class: "cause-action" }, inc.cause.action)) : null,
    el("table", { class: "grid rules" },
      el("thead", {}, el("tr", {}, ...["Level", "Point", "Rule", "Value", "Since", "State", "Actions"]
        .map((h) => el("th", { scope: "col" }, h)))),
      el("tbody", {}, ...inc.rules.map(ruleRow))));
  }

  async function loadOpen() {
    const q = filters(); q.set("view", view);
    const d = await HW.api(`/api/v1/alarms/incidents?${q}`);
    const list = $("#incident-list");
    list.replaceChildren(...d.incidents.map(incidentCard));
    const danger = d.incidents.filter((i) => i.level === "danger").length;
    $("#incident-summary").textContent = d.incidents.length
      ? `${d.incidents.length} machine${d.incidents.length === 1 ? "" : "s"} with ${view === "all" ? "open" : view}`
        + ` alarms, ${danger} in danger; worst first.`
      : `No ${view === "all" ? "open" : view} alarm.`;
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
    $("#dlg-form").addEventListener("submit", confirmDialog);
    $("#dlg-cancel").addEventListener("click", () => $("#alarm-dialog").close());
    const asked = new URLSearchParams(location.search).get("asset_id");  // the email's "alarms of this machine"
    if (asked && [...$("#af-asset").options].some((o) => o.value === asked)) $("#af-asset").value = asked;
    load();
  }
  document.addEventListener("DOMContentLoaded", init);
})();
