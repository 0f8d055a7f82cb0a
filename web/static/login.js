"use strict";
document.getElementById("login-form").addEventListener("submit", async (ev) => {
  ev.preventDefault();
  const f = ev.target;
  const box = document.getElementById("login-error");
  box.hidden = true;
  try {
    await HW.api("/api/v1/session", { method: "POST", json: { username: f.username.value, password: f.password.value } });
    window.location.assign(document.getElementById("next").value || "/");
  } catch (err) {
    HW.showError(box, err);
  }
});
