/* halfwatch dashboard: the one fetch wrapper, time formatting in the site's zone, and small DOM helpers.
   HW.api(path, {method, json, form}) resolves to the parsed JSON and throws HW.ApiError when the answer
   is not ok (the API's error shape: {ok:false, error:{code,message,field}, status}). State-changing
   requests carry the session's CSRF token (cookie halfwatch_csrf) in the X-CSRF-Token header. */
"use strict";
window.HW = window.HW || {};
(function (HW) {
  class ApiError extends Error {
    constructor(status, code, message, field) {
      super(message); this.status = status; this.code = code; this.field = field;
    }
  }
  HW.ApiError = ApiError;

  function cookie(name) {
    const hit = document.cookie.split("; ").find((c) => c.startsWith(name + "="));
    return hit ? decodeURIComponent(hit.slice(name.length + 1)) : null;
  }
  HW.csrfToken = () => cookie("halfwatch_csrf");

  HW.api = async function api(path, opts = {}) {
    const method = (opts.method || "GET").toUpperCase();
    const headers = { Accept: "application/json" };
    let body;
    if (opts.json !== undefined) {
      headers["Content-Type"] = "application/json"; body = JSON.stringify(opts.json);
    }
    else if (opts.form !== undefined) { body = opts.form; }
    if (method !== "GET" && method !== "HEAD") {
      const token = HW.csrfToken();
      if (token) headers["X-CSRF-Token"] = token;
    }
    let resp;
    try {
      resp = await fetch(path, { method, headers, body, credentials: "same-origin" });
    } catch (e) {
      throw new ApiError(0, "network", "the server did not answer; check the connection and retry", null);
    }
    let data = null;
    const text = await resp.text();
    try { data = text ? JSON.parse(text) : {}; } catch (e) { data = null; }
    if (resp.status === 401 && !path.startsWith("/api/v1/session")) {
      window.location.assign("/login?next=" + encodeURIComponent(location.pathname + location.search));
    }
    if (!resp.ok || !data || data.ok === false) {
      const err = (data && data.error) || {};
      throw new ApiError(resp.status, err.code || "error",
        err.message || `request failed with HTTP ${resp.status}`, err.field || null);
    }
    return data;
  };

  /* ---- times: always shown in the site's zone, with the zone named ---- */
  HW.defaultTz = () => document.body.dataset.defaultTz || "UTC";
  const partsCache = {};
  function fmt(tz) {
    if (!partsCache[tz]) {
      partsCache[tz] = new Intl.DateTimeFormat("en-GB", { timeZone: tz, year: "numeric", month: "2-digit",
        day: "2-digit", hour: "2-digit", minute: "2-digit", second: "2-digit", hourCycle: "h23" });
    }
    return partsCache[tz];
  }
  /* "YYYY-MM-DD HH:MM:SS" of an ISO time in zone tz: plotly draws these as wall-clock times. */
  HW.wall = function (iso, tz) {
    if (!iso) return null;
    const p = {};
    for (const part of fmt(tz || HW.defaultTz()).formatToParts(new Date(iso))) p[part.type] = part.value;
    return `${p.year}-${p.month}-${p.day} ${p.hour}:${p.minute}:${p.second}`;
  };
  HW.when = function (iso, tz) {
    if (!iso) return "—";
    return HW.wall(iso, tz).slice(0, 16);
  };
  HW.age = function (iso, now) {
    if (!iso) return "no reading";
    const s = ((now ? new Date(now) : new Date()) - new Date(iso)) / 1000;
    if (s < 90) return "just now";
    if (s < 5400) return `${Math.round(s / 60)} min ago`;
    if (s < 129600) return `${Math.round(s / 3600)} h ago`;
    return `${Math.round(s / 86400)} d ago`;
  };
  /* ISO (UTC) of a wall-clock "YYYY-MM-DDTHH:MM" in zone tz (for date inputs). */
  HW.fromWall = function (wall, tz) {
    const guess = new Date(wall + "Z");
    const shown = new Date(HW.wall(guess.toISOString(), tz).replace(" ", "T") + "Z");
    return new Date(guess.getTime() - (shown - guess)).toISOString();
  };

  /* ---- numbers and levels ---- */
  /* A number in plain positional form (never "3.82e-5"), rounded to `digits` significant digits;
     whole numbers from 10^digits up are rounded to units. */
  HW.num = function (x, digits = 3) {
    if (x === null || x === undefined || !isFinite(x)) return "—";
    const a = Math.abs(x);
    if (a === 0) return "0";
    if (a >= 10 ** digits) return Math.round(x).toString();
    const exp = Math.floor(Math.log10(a));
    const places = Math.max(0, digits - 1 - exp);
    const s = x.toFixed(Math.min(places, 20));
    return s.includes(".") ? s.replace(/\.?0+$/, "") : s;
  };
  /* ---- icons: inline SVG, so no icon depends on an emoji or symbol font ---- */
  const SVGNS = "http://www.w3.org/2000/svg";
  const ICONS = {
    normal: [["circle", { cx: 8, cy: 8, r: 5.5, fill: "none", stroke: "currentColor", "stroke-width": 2 }]],
    alert: [["path", { d: "M8 1.8 L14.6 14 H1.4 Z", fill: "currentColor" }]],
    danger: [["path", { d: "M8 1 L15 8 L8 15 L1 8 Z", fill: "currentColor" }]],
    clock: [["circle", { cx: 8, cy: 8, r: 6.2, fill: "none", stroke: "currentColor", "stroke-width": 1.8 }],
      ["path", { d: "M8 4.2 V8.3 L10.8 10", fill: "none", stroke: "currentColor", "stroke-width": 1.8,
        "stroke-linecap": "round" }]],
    check: [["path", { d: "M2.5 8.5 L6.5 12.5 L13.5 4", fill: "none", stroke: "currentColor",
      "stroke-width": 2.2, "stroke-linecap": "round" }]],
    caution: [["path", { d: "M8 1.2 L15.2 14.4 H0.8 Z", fill: "none", stroke: "currentColor",
      "stroke-width": 1.6, "stroke-linejoin": "round" }],
      ["path", { d: "M8 5.6 V9.8", stroke: "currentColor", "stroke-width": 1.8, "stroke-linecap": "round" }],
      ["circle", { cx: 8, cy: 12.2, r: 1.05, fill: "currentColor" }]],
  };
  /* An inline SVG icon (aria-hidden: the word beside it carries the meaning). */
  HW.icon = function (name, cls) {
    const svg = document.createElementNS(SVGNS, "svg");
    for (const [k, v] of Object.entries({ viewBox: "0 0 16 16", width: "1em", height: "1em",
      "aria-hidden": "true", focusable: "false",
      class: `icon icon-${name}${cls ? " " + cls : ""}`, "data-icon": name })) svg.setAttribute(k, v);
    for (const [tag, attrs] of ICONS[name] || ICONS.normal) {
      const e = document.createElementNS(SVGNS, tag);
      for (const [k, v] of Object.entries(attrs)) e.setAttribute(k, v);
      svg.append(e);
    }
    return svg;
  };
  HW.levelBadge = function (level) {
    const word = ["normal", "alert", "danger"].includes(level) ? level : (level || "unknown");
    const span = HW.el("span", { class: `level level-${level}` });
    span.append(HW.icon(ICONS[level] ? level : "normal", "level-icon"), " ", word);
    return span;
  };
  const ZONE_WORDS = { A: "A · newly commissioned", B: "B · unrestricted", C: "C · restricted",
    D: "D · damage risk" };
  HW.zoneBadge = function (zone) {
    if (!zone) return HW.el("span", { class: "muted" }, "—");
    return HW.el("span", { class: `zone zone-${zone}`, title: ZONE_WORDS[zone] || zone }, `zone ${zone}`);
  };

  /* ---- words for stored codes ---- */
  const KIND_WORDS = { reciprocating_compressor: "reciprocating compressor",
    screw_compressor: "screw compressor",
    centrifugal_compressor: "centrifugal compressor", gearbox: "gearbox", pump: "pump", fan: "fan",
    motor: "motor", blower: "blower", cooling_tower: "cooling-tower fan", turbine: "turbine" };
  HW.kindWords = (kind) => KIND_WORDS[kind] || String(kind || "machine").replace(/_/g, " ");
  const FORCING_WORDS = { shaft: "shaft rotation", stroke: "piston strokes", mesh: "gear mesh",
    blade: "blade pass", other: "another source" };
  HW.forcingWords = (kind) => FORCING_WORDS[kind] || String(kind || "").replace(/_/g, " ");
  /* What "speed" means on a machine: always shaft speed; the forcing (1X) may be a multiple of it. */
  HW.speedMeaning = function (asset) {
    const m = Number(asset.forcing_multiplier || 1);
    if (Math.abs(m - 1) < 1e-9 && (asset.forcing_kind || "shaft") === "shaft") {
      return "speed = shaft speed; the forcing (1X) is the shaft speed";
    }
    return `speed = shaft speed; the forcing (1X, ${HW.forcingWords(asset.forcing_kind)}) is `
      + `${HW.num(m, 4)} × shaft speed`;
  };

  /* ---- DOM ---- */
  HW.el = function (tag, attrs = {}, ...children) {
    const e = document.createElement(tag);
    for (const [k, v] of Object.entries(attrs || {})) {
      if (v === null || v === undefined || v === false) continue;
      if (k.startsWith("on")) e.addEventListener(k.slice(2), v); else e.setAttribute(k, v === true ? "" : v);
    }
    for (const c of children.flat()) {
      if (c !== null && c !== undefined) e.append(c instanceof Node ? c : String(c));
    }
    return e;
  };
  HW.$ = (sel, root) => (root || document).querySelector(sel);
  HW.showError = function (where, err) {
    const box = typeof where === "string" ? HW.$(where) : where;
    if (!box) return;
    box.hidden = false;
    box.textContent = err instanceof HW.ApiError
      ? `${err.message}${err.field ? ` (field: ${err.field})` : ""}` : String(err);
  };
  HW.role = () => document.body.dataset.role || "";
  const RANK = { viewer: 0, technician: 1, engineer: 2, admin: 3 };
  HW.may = (role) => (RANK[HW.role()] ?? -1) >= RANK[role];
  HW.param = (name) => new URLSearchParams(location.search).get(name);

  document.addEventListener("DOMContentLoaded", () => {
    const out = document.getElementById("logout");
    if (out) out.addEventListener("click", async () => {
      try { await HW.api("/api/v1/session", { method: "DELETE" }); } catch (e) { /* already out */ }
      window.location.assign("/login");
    });
  });
})(window.HW);
