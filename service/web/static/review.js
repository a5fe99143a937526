// Apportion review pages: load the server-rendered fragment with the viewer's key and send the
// decisions to the JSON lifecycle API. The key lives in sessionStorage (this tab only), is sent
// as a Bearer header to this origin only, and never goes into a URL.
(function () {
  "use strict";
  var STORE = "apportion.key";
  var main, keyform, keyinput, forget, whoami;

  function key() { return sessionStorage.getItem(STORE); }

  function problemText(status, text) {
    try {
      var p = JSON.parse(text);
      return (p.title ? p.title + ": " : "") + (p.detail || "") || ("HTTP " + status);
    } catch (err) { return "HTTP " + status; }
  }

  function showError(message) {
    main.innerHTML = "";
    var p = document.createElement("p");
    p.className = "error";
    p.setAttribute("role", "alert");
    p.textContent = message;
    main.appendChild(p);
  }

  function load() {
    var k = key();
    forget.hidden = !k;
    keyform.classList.toggle("signed-in", !!k);
    if (!k) { whoami.textContent = "no key"; return; }
    fetch(main.dataset.fragment, { headers: { "Authorization": "Bearer " + k }, cache: "no-store",
                                   credentials: "omit" })
      .then(function (r) { return r.text().then(function (t) { return { r: r, t: t }; }); })
      .then(function (x) {
        if (!x.r.ok) {
          if (x.r.status === 401) {
            sessionStorage.removeItem(STORE);
            forget.hidden = true;
            keyform.classList.remove("signed-in");
          }
          whoami.textContent = "";
          showError(problemText(x.r.status, x.t));
          return;
        }
        main.innerHTML = x.t;
        var frag = main.querySelector(".fragment");
        whoami.textContent = frag ? "viewing as " + frag.dataset.viewer + " (" + frag.dataset.role + ")" : "";
        document.body.dataset.loaded = "1";
      })
      .catch(function (err) { showError("Could not reach the service: " + err); });
  }

  function decide(button) {
    var form = button.closest("form");
    var msg = form.querySelector("#decision-message");
    var reason = form.querySelector("textarea").value.trim();
    if (reason.length < 3) { msg.textContent = "Write a reason (at least 3 characters)."; return; }
    var plan = encodeURIComponent(form.dataset.plan), version = Number(form.dataset.version);
    var action = button.dataset.action, url, body = { reason: reason };
    if (action === "approve" || action === "reject") {
      url = "/v1/plans/" + plan + "/versions/" + version + "/" + action;
    } else if (action === "activate") {
      url = "/v1/plans/" + plan + "/activate";
      body.version = version;
      body.expected_revision = Number(form.dataset.revision);
    } else {
      url = "/v1/plans/" + plan + "/rollback";
      body.expected_revision = Number(form.dataset.revision);
    }
    var buttons = form.querySelectorAll("button");
    buttons.forEach(function (b) { b.disabled = true; });
    msg.textContent = "Sending\u2026";
    fetch(url, { method: "POST", credentials: "omit", cache: "no-store",
                 headers: { "Authorization": "Bearer " + key(), "Content-Type": "application/json" },
                 body: JSON.stringify(body) })
      .then(function (r) { return r.text().then(function (t) { return { r: r, t: t }; }); })
      .then(function (x) {
        if (x.r.ok) { window.location.reload(); return; }
        buttons.forEach(function (b) { b.disabled = false; });
        msg.textContent = problemText(x.r.status, x.t);
      })
      .catch(function (err) {
        buttons.forEach(function (b) { b.disabled = false; });
        msg.textContent = "Could not reach the service: " + err;
      });
  }

  document.addEventListener("DOMContentLoaded", function () {
    main = document.getElementById("content");
    keyform = document.getElementById("keyform");
    keyinput = document.getElementById("apikey");
    forget = document.getElementById("forget");
    whoami = document.getElementById("whoami");
    keyform.addEventListener("submit", function (ev) {
      ev.preventDefault();
      var k = keyinput.value.trim();
      if (!k) { return; }
      sessionStorage.setItem(STORE, k);
      keyinput.value = "";
      load();
    });
    forget.addEventListener("click", function () {
      sessionStorage.removeItem(STORE);
      window.location.reload();
    });
    main.addEventListener("click", function (ev) {
      var b = ev.target.closest("button[data-action]");
      if (b) { ev.preventDefault(); decide(b); }
    });
    load();
  });
})();
