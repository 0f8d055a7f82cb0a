/* Settings (engineers and admins): machines and points, alarm rules, email subscriptions; for admins also
   users and API keys (a new key is shown once, right after it is made). */
"use strict";
(function () {
  const { el, $ } = HW;
  const tz = HW.defaultTz();
  let tree = null;
  const allAssets = () => tree.sites.flatMap((s) => s.areas.flatMap((ar) => ar.assets.map((a) =>
    Object.assign({ site: s, area: ar }, a))));

  function done(msg) {
    const b = $("#settings-done"); b.hidden = false; b.textContent = msg; $("#settings-error").hidden = true;
  }
  const fail = (e) => HW.showError("#settings-error", e);

  /* A labelled form from field specs: [name, label, type|options, extra]. submit(values) -> Promise. */
  function form(idp, title, fields, submit, opts) {
    const f = el("form", { class: "inline-form", id: `${idp}-form`, "aria-label": title,
      onsubmit: async (ev) => {
      ev.preventDefault();
      const v = {};
      for (const [name, , type] of fields) {
        const input = f.elements[name];
        if (type === "checkbox") v[name] = input.checked;
        else if (type === "number") v[name] = input.value === "" ? null : Number(input.value);
        else v[name] = input.value;
      }
      try { await submit(v); if (!(opts && opts.keep)) f.reset(); } catch (e) { fail(e); }
    } });
    for (const [name, label, type, extra] of fields) {
      const id = `${idp}-${name}`;
      let input;
      if (Array.isArray(type)) input = el("select", { id, name },
        type.map((o) => (Array.isArray(o) ? el("option",
        { value: o[0] }, o[1]) : el("option", { value: o }, o))));
      else input = el("input", Object.assign({ id, name, type: type || "text" }, extra || {}));
      f.append(type === "checkbox" ? el("label", { class: "check" }, input, label) : el("div", {}, el("label",
        { for: id }, label), input));
    }
    f.append(el("button", { type: "submit", class: "primary" }, title));
    return f;
  }

  const KINDS = ["pump", "fan", "compressor", "gearbox", "reciprocating_compressor", "engine", "other"];
  const kindOptions = KINDS.map((k) => [k, HW.kindWords(k)]);
  const FORCING = ["shaft", "stroke", "mesh", "other"].map((k) => [k, HW.forcingWords(k)]);
  const GROUPS = [["2", "2 (medium, 15–300 kW)"], ["1", "1 (large, 300 kW–50 MW)"]];

  /* Change one machine (PUT /api/v1/assets/{id}: the server checks its site as it is and as it will be,
     refuses control characters in names and writes the audit trail), then show that trail. */
  function machineEditor(a) {
    const id = `edit-${a.id}`;
    const box = el("div", { class: "machine-audit", id: `${id}-audit` });
    const f = form(id, `Save ${a.name}`, [["name", "Machine name", "text", { value: a.name,
      maxlength: "120" }],
      ["kind", "Kind", kindOptions], ["nominal_speed_hz", "Nominal shaft speed (Hz)", "number",
        { step: "0.001", min: "0", value: a.nominal_speed_hz }],
      ["machine_group", "ISO 20816 group", GROUPS], ["foundation", "Support", [["rigid", "rigid"],
        ["flexible", "flexible"]]], ["forcing_kind", "Forcing from", FORCING],
      ["forcing_multiplier", "Forcing (1X) = shaft speed ×", "number", { step: "0.001", min: "0",
        value: a.forcing_multiplier }]],
    async (v) => {
      const body = { area_id: a.area.id, name: v.name, kind: v.kind, nominal_speed_hz: v.nominal_speed_hz,
        machine_group: Number(v.machine_group), foundation: v.foundation, forcing_kind: v.forcing_kind,
        forcing_multiplier: v.forcing_multiplier, rated_power_kw: a.rated_power_kw,
        description: a.description || "" };
      await HW.api(`/api/v1/assets/${a.id}`, { method: "PUT", json: body });
      done(`Machine ${v.name} saved.`);
      await reloadTree();
      const again = document.querySelector(`details[data-asset-id="${a.id}"]`);
      if (again) { again.open = true; await loadAudit(a.id); }
    }, { keep: true });
    for (const [name, value] of [["kind", a.kind], ["machine_group", String(a.machine_group)],
      ["foundation", a.foundation], ["forcing_kind", a.forcing_kind]]) f.elements[name].value = value;
    return el("details", { class: "machine-edit", "data-asset-id": a.id,
      ontoggle: (ev) => { if (ev.target.open) loadAudit(a.id).catch(fail); } },
    el("summary", {}, `Change ${a.name}`), f, box);
  }

  async function loadAudit(assetId) {
    const d = await HW.api("/api/v1/audit?target=asset&limit=200");
    const rows = d.changes.filter((c) => c.target_id === assetId);
    const words = (c) => Object.entries((c.details || {}).changed || {}).map(([k, [was, now]]) =>
      `${k.replace(/_/g, " ")}: ${was ?? "—"} → ${now ?? "—"}`).join("; ") || c.action;
    $(`#edit-${assetId}-audit`).replaceChildren(el("h4", {}, "Changes to this machine (audit trail)"),
      rows.length ? el("table", { class: "grid" }, el("thead", {}, el("tr", {}, ["When", "Who", "What"]
        .map((h) => el("th", { scope: "col" }, h)))), el("tbody", {}, rows.map((c) => el("tr", {},
        el("td", {}, HW.when(c.created_at, tz)), el("td", {}, c.actor), el("td", {}, words(c))))))
        : el("p", { class: "muted" }, "No change recorded yet."));
  }

  function renderPlant() {
    $("#plant-list").replaceChildren(...tree.sites.map((s) => el("div", {}, el("h3", {}, s.name),
      el("table", { class: "grid" }, el("thead", {}, el("tr", {}, ["Area", "Machine", "Kind",
        "Nominal shaft speed", "What speed means", "ISO 20816 group / support", "Points"]
        .map((h) => el("th", { scope: "col" }, h)))),
        el("tbody", {}, s.areas.flatMap((ar) => ar.assets.map((a) => el("tr", { "data-asset-id": a.id },
          el("td", {}, ar.name), el("td", {}, el("a", { href: `/assets/${a.id}` }, a.name)),
          el("td", {}, HW.kindWords(a.kind)),
          el("td", {}, `${HW.num(a.nominal_speed_hz, 5)} Hz (${Math.round(a.nominal_speed_hz * 60)} r/min)`),
          el("td", {}, HW.speedMeaning(a)),
          el("td", {}, `${a.machine_group} / ${a.foundation}`),
          el("td", {}, a.points.map((p) => `${p.name} (${p.units}, ${p.direction})`).join("; ") || "—"))))),
        el("div", { class: "machine-edits" }, s.areas.flatMap((ar) => ar.assets.map((a) =>
          machineEditor(Object.assign({ site: s, area: ar }, a)))))))));
    const sites = tree.sites.map((s) => [s.id, s.name]);
    const areas = tree.sites.flatMap((s) => s.areas.map((ar) => [ar.id, `${s.name} › ${ar.name}`]));
    const assets = allAssets().map((a) => [a.id, `${a.site.name} › ${a.name}`]);
    const after = (msg) => async () => { done(msg); await reloadTree(); await loadSubs(); };
    $("#plant-forms").replaceChildren(
      form("site", "Add site", [["name", "Site name"]], async (v) => { await HW.api("/api/v1/sites",
        { method: "POST",
        json: v }); await after(`Site ${v.name} added.`)(); }),
      form("area", "Add area", [["site_id", "Site", sites], ["name", "Area name"]],
        async (v) => { await HW.api("/api/v1/areas", { method: "POST", json: { site_id: Number(v.site_id),
        name: v.name } }); await after(`Area ${v.name} added.`)(); }),
      form("asset", "Add machine", [["area_id", "Area", areas], ["name", "Machine name"], ["kind", "Kind",
        kindOptions], ["nominal_speed_hz", "Nominal shaft speed (Hz)", "number", { step: "0.01", min: "0" }],
        ["machine_group", "ISO 20816 group", GROUPS],
        ["foundation", "Support", ["rigid", "flexible"]], ["forcing_kind", "Forcing from", FORCING],
        ["forcing_multiplier", "Forcing (1X) = shaft speed ×", "number", { step: "0.01", min: "0",
          value: "1" }]],
      async (v) => { await HW.api("/api/v1/assets", { method: "POST", json: Object.assign(v,
        { area_id: Number(v.area_id), machine_group: Number(v.machine_group),
        forcing_multiplier: v.forcing_multiplier || 1 }) }); await after(`Machine ${v.name} added.`)(); }),
      form("point", "Add point", [["asset_id", "Machine", assets], ["name", "Point name"], ["location",
        "Location"],
        ["direction", "Direction", ["horizontal", "vertical", "axial", "radial", "other"]],
        ["units", "Units", ["m/s2", "g", "mm/s2"]], ["expected_fs_hz", "Sample rate (Hz)", "number",
          { min: "0" }]],
      async (v) => { await HW.api("/api/v1/points", { method: "POST", json: Object.assign(v,
        { asset_id: Number(v.asset_id) }) }); await after(`Point ${v.name} added.`)(); }));
    const sel = $("#rule-point");
    const keep = sel.value;
    sel.replaceChildren(...allAssets().flatMap((a) => a.points.map((p) => el("option", { value: p.id },
      `${a.name} · ${p.name}`))));
    if (keep) sel.value = keep;
  }

  async function loadRules() {
    const pid = $("#rule-point").value;
    if (!pid) return;
    const owner = allAssets().find((a) => a.points.some((p) => String(p.id) === String(pid)));
    const [d, view] = await Promise.all([HW.api(`/api/v1/alarms/rules?point_id=${pid}`),
      owner ? HW.api(`/api/v1/dashboard/assets/${owner.id}`) : null]);
    const zl = view ? view.zone_limits_rms_mm_s : null;
    const zoneWords = (r) => zl ? `set by the ISO 20816 zones of this machine (group ${owner.machine_group}, `
      + `${owner.foundation} support): alert from the B/C boundary ${HW.num(zl[1])} mm/s r.m.s., danger from `
      + `the C/D boundary ${HW.num(zl[2])} mm/s r.m.s.; change the group or support to change them`
      : "set by the ISO 20816 zones of the machine's group and support";
    if ($("#rule-point").value !== pid) return;  // another point was chosen meanwhile
    $("#rules-table tbody").dataset.pointId = pid;
    $("#rules-table tbody").replaceChildren(...d.rules.map((r) => {
      const a = el("input", { type: "number", step: "any", value: r.alert ?? "",
        "aria-label": `${r.label} alert level`, disabled: r.zone_based });
      const g = el("input", { type: "number", step: "any", value: r.danger ?? "",
        "aria-label": `${r.label} danger level`, disabled: r.zone_based });
      const en = el("input", { type: "checkbox", checked: r.enabled, "aria-label": `${r.label} enabled` });
      const unitText = r.unit || (r.metric === "threshold_margin" ? "as a fraction (0.2 = 20 %)" : "");
      const unit = unitText ? el("span", { class: "unit" }, ` ${unitText}`) : null;
      const levelCells = r.zone_based
        ? [el("td", { colspan: 2, class: "zone-rule" }, `Levels ${zoneWords(r)}.`)]
        : [el("td", {}, a, unit), el("td", {}, g, unit && unit.cloneNode(true))];
      return el("tr", { "data-metric": r.metric }, el("td", {},
        `${r.label}${r.unit ? ` (${r.unit})` : ""}${r.is_default ? "" : " · changed"}`),
        ...levelCells, el("td", {}, `${r.k} of the last ${r.n} readings`), el("td", {}, en),
        el("td", {}, el("button", { type: "button", onclick: async () => {
          try {
            const body = { point_id: Number(pid), metric: r.metric, k: r.k, n: r.n, hysteresis: r.hysteresis,
              enabled: en.checked, zone_based: r.zone_based, direction: r.direction };
            if (!r.zone_based) {
              body.alert = a.value === "" ? null : Number(a.value);
              body.danger = g.value === "" ? null : Number(g.value);
            }
            await HW.api("/api/v1/alarms/rules", { method: "PUT", json: body });
            done(`Rule ${r.label} saved.`); loadRules();
          } catch (e) { fail(e); }
        } }, "Save")));
    }));
  }

  async function loadSubs() {
    const d = await HW.api("/api/v1/alarms/subscriptions");
    const areaOf = (id) => tree.sites.flatMap((x) => x.areas.map((ar) => [x, ar])).find(([,
      ar]) => ar.id === id);
    const scopeName = (s) => {
      if (s.scope === "asset") {
        const a = allAssets().find((x) => x.id === s.scope_id);
        return a ? `machine ${a.name} (${a.site.name} › ${a.area.name})` : `machine no. ${s.scope_id}`;
      }
      if (s.scope === "site") {
        const x = tree.sites.find((y) => y.id === s.scope_id);
        return x ? `site ${x.name}` : `site no. ${s.scope_id}`;
      }
      const hit = areaOf(s.scope_id);
      return hit ? `area ${hit[1].name} (${hit[0].name})` : `area no. ${s.scope_id}`;
    };
    $("#subs-table tbody").replaceChildren(...d.subscriptions.map((s) => el("tr", {}, el("td", {}, s.email),
      el("td",
      {}, scopeName(s)),
      el("td", {}, `${s.min_level} and above`), el("td", {},
        s.mode === "digest" ? `daily at ${s.digest_time} ${s.timezone}` : "immediate"),
      el("td", {}, el("button", { type: "button",
        onclick: async () => { try { await HW.api(`/api/v1/alarms/subscriptions/${s.id}`,
        { method: "DELETE" }); done("Subscription ended."); loadSubs(); } catch (e) { fail(e); } } },
          "End")))));
    if (!d.subscriptions.length) $("#subs-table tbody").append(el("tr", {}, el("td", { colspan: 5 },
      "No subscription yet.")));
    const scopes = [...tree.sites.map((s) => [`site:${s.id}`, `site ${s.name}`]),
      ...tree.sites.flatMap((s) => s.areas.map((ar) => [`area:${ar.id}`, `area ${ar.name} (${s.name})`])),
      ...allAssets().map((a) => [`asset:${a.id}`, `machine ${a.name}`])];
    const addr = HW.may("engineer") ? [["email", "Address (empty: your own)", "email"]] : [];
    $("#sub-form").replaceChildren(form("sub", HW.may("engineer") ? "Subscribe" : "Subscribe me", [...addr,
      ["scope", "For", scopes],
      ["min_level", "From level", ["alert", "danger"]], ["mode", "Mode", ["immediate", "digest"]],
        ["digest_time",
      "Digest time", "time", { value: "07:00" }]],
      async (v) => {
        const [scope, id] = v.scope.split(":");
        const v_email = HW.may("engineer") ? v.email : null;  // viewers and technicians: their own address
        await HW.api("/api/v1/alarms/subscriptions", { method: "POST", json: { email: v_email || null, scope,
          scope_id: Number(id), min_level: v.min_level, mode: v.mode, digest_time: v.digest_time || "07:00",
          timezone: tz } });
        done(`Subscribed ${v_email || "you"}.`); loadSubs();
      }));
  }

  async function loadUsers() {
    const d = await HW.api("/api/v1/users");
    const roles = ["viewer", "technician", "engineer", "admin"];
    $("#users-table tbody").replaceChildren(...d.users.map((u) => {
      const sel = el("select", { "aria-label": `role of ${u.username}`,
        onchange: async (ev) => { try { await HW.api(`/api/v1/users/${u.id}`, { method: "PATCH",
        json: { role: ev.target.value } }); done(`${u.username} is now ${ev.target.value}.`); }
        catch (e) { fail(e); } } },
        roles.map((r) => el("option", { value: r, selected: r === u.role }, r)));
      const act = el("input", { type: "checkbox", checked: u.active, "aria-label": `${u.username} active`,
        onchange: async (ev) => { try { await HW.api(`/api/v1/users/${u.id}`, { method: "PATCH",
        json: { active: ev.target.checked } });
        done(`${u.username} ${ev.target.checked ? "activated" : "deactivated"}.`); }
        catch (e) { fail(e); } } });
      return el("tr", {}, el("td", {}, u.username), el("td", {}, u.email || "—"), el("td", {}, sel),
        el("td",
        {}, act));
    }));
    $("#user-form").replaceChildren(form("user", "Add user", [["username", "User name"], ["email", "Email",
      "email"],
      ["password", "Password (8+ characters)", "password", { autocomplete: "new-password" }], ["role",
        "Role", roles]],
      async (v) => { await HW.api("/api/v1/users", { method: "POST",
        json: v }); done(`User ${v.username} added.`); loadUsers(); }));
  }

  async function loadKeys() {
    const d = await HW.api("/api/v1/apikeys");
    const siteName = (id) => id == null ? "all sites"
      : (tree.sites.find((s) => s.id === id) || {}).name || id;
    $("#keys-table tbody").replaceChildren(...d.api_keys.map((k) => el("tr", {}, el("td", {}, k.name),
      el("td", {},
      k.prefix), el("td", {}, k.role), el("td", {}, siteName(k.site_id)),
      el("td", {}, k.revoked_at ? `revoked ${HW.when(k.revoked_at, tz)}` : HW.when(k.last_used_at, tz)),
      el("td", {}, k.revoked_at ? "" : el("button", { type: "button",
        onclick: async () => { try { await HW.api(`/api/v1/apikeys/${k.id}`,
        { method: "DELETE" }); done(`Key ${k.name} revoked.`); loadKeys(); } catch (e) { fail(e); } } },
          "Revoke")))));
    $("#key-form").replaceChildren(form("key", "Create key", [["name", "Name (e.g. the gateway)"], ["role",
      "Role",
      ["technician", "viewer", "engineer", "admin"]], ["site_id", "Site", [["", "all sites"],
      ...tree.sites.map((s) => [String(s.id), s.name])]]],
      async (v) => {
        const out = await HW.api("/api/v1/apikeys", { method: "POST", json: { name: v.name, role: v.role,
          site_id: v.site_id ? Number(v.site_id) : null } });
        const box = $("#key-shown");
        box.hidden = false;
        box.replaceChildren(el("p", { class: "notice" },
          "Copy this key now: it is shown only once and cannot be read back."), el("p", { class: "keyshow",
          id: "new-key" }, out.key));
        loadKeys();
      }));
  }

  async function reloadTree() { tree = await HW.api("/api/v1/tree"); if (HW.may("engineer")) renderPlant(); }

  async function init() {
    try {
      await reloadTree();
      if (HW.may("engineer")) $("#rule-point").addEventListener("change", () => loadRules().catch(fail));
      await Promise.all([HW.may("engineer") ? loadRules() : null, loadSubs(),
        HW.may("admin") ? loadUsers() : null,
        HW.may("admin") ? loadKeys() : null]);
      document.body.dataset.ready = "1";
    } catch (e) { fail(e); }
  }
  document.addEventListener("DOMContentLoaded", init);
})();
