"use strict";
// Where to go after logging in: a path on this server only (the server's rule is safe_next_path in
// server/routes/pages.py). Browsers read "\" as "/" and drop tabs and line breaks, so "/\evil" and
// "/<TAB>/evil" would leave the site; anything that is not a plain same-origin path goes to "/".
function sameOriginPath(value) {
  if (typeof value !== "string" || !value.startsWith("/") || value[1] === "/" || value[1] === "\\") return "/";
  if (/[\\\s\u0000-\u001f\u007f-\u009f]/.test(value)) return "/";
  let url;
  try {
    url = new URL(value, window.location.origin);
  } catch (_) {
    return "/";
  }
  return url.origin === window.location.origin ? url.pathname + url.search + url.hash : "/";
}

document.getElementById("login-form").addEventListener("submit", async (ev) => {
  ev.preventDefault();
  const f = ev.target;
  const box = document.getElementById("login-error");
  box.hidden = true;
  try {
    await HW.api("/api/v1/session", { method: "POST", json: { username: f.username.value, password: f.password.value } });
    window.location.assign(sameOriginPath(document.getElementById("next").value));
  } catch (err) {
    HW.showError(box, err);
  }
});
