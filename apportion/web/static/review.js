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

  // Only these URLs are fragments; anything else in data-fragment is refused before it is fetched.
  var FRAGMENT_URL = /^\/ui\/fragments\/plans(\/[a-z0-9][a-z0-9_-]{0,99}\/versions\/[1-9][0-9]{0,17})?$/;
  var ACTIONS = { approve: "Approve", reject: "Reject", activate: "Make live",
                  rollback: "Roll back to the previous version" };
  var PLAN_KEY = /^[a-z0-9][a-z0-9_-]{0,99}$/, NUMBER = /^[0-9]{1,18}$/;

  // A server-made fragment: a 200 from the fragment URL itself (no redirect), served as HTML with
  // the fragment marker header, holding exactly one <div class="fragment">. Returns it, or null.
  function fragmentOf(r, text) {
    var type = (r.headers.get("Content-Type") || "").split(";")[0].trim().toLowerCase();
    if (r.status !== 200 || r.redirected || type !== "text/html" ||
        r.headers.get("X-Apportion-Fragment") !== "1") { return null; }
    var t = document.createElement("template");
    t.innerHTML = text;
    var nodes = t.content.children;
    if (nodes.length !== 1 || !nodes[0].matches("div.fragment")) { return null; }
    return nodes[0];
  }

  function load() {
    var k = key();
    forget.hidden = !k;
    keyform.classList.toggle("signed-in", !!k);
    if (!k) { whoami.textContent = "no key"; return; }
    var url = main.dataset.fragment;
    if (!FRAGMENT_URL.test(url)) { showError("Not a review page address."); return; }
    fetch(url, { headers: { "Authorization": "Bearer " + k }, cache: "no-store",
                 credentials: "omit", redirect: "error" })
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
        var frag = fragmentOf(x.r, x.t);
        if (!frag) { whoami.textContent = ""; showError("The service sent something other than a review page."); return; }
        main.replaceChildren(frag);
        whoami.textContent = "viewing as " + frag.dataset.viewer + " (" + frag.dataset.role + ")";
        offerDecisions(frag);
        document.body.dataset.loaded = "1";
      })
      .catch(function (err) { showError("Could not reach the service: " + err); });
  }

  // The decision buttons are made here, one per action the fragment's decision form names, and
  // each is bound to this form's plan, version and revision when it is made. Nothing else on the
  // page can start a decision: no listener looks at clicks on other elements.
  function offerDecisions(frag) {
    var section = frag.querySelector(":scope > section#decision");
    var form = section && section.querySelector(":scope > form#decide");
    if (!form) { return; }
    var d = form.dataset, where = form.querySelector(":scope > div.buttons");
    var textarea = form.querySelector(":scope > textarea#reason");
    var msg = form.querySelector(":scope > p#decision-message");
    if (!where || !textarea || !msg || !PLAN_KEY.test(d.plan || "") || !NUMBER.test(d.version || "") ||
        !NUMBER.test(d.revision || "")) { return; }
    var target = { plan: d.plan, version: Number(d.version), revision: Number(d.revision),
                   textarea: textarea, msg: msg, buttons: [] };
    (d.actions || "").split(" ").forEach(function (action) {
      if (!Object.prototype.hasOwnProperty.call(ACTIONS, action)) { return; }
      var b = document.createElement("button");
      b.type = "button";
      b.className = "act act-" + action;
      b.dataset.action = action;
      b.textContent = ACTIONS[action];
      b.addEventListener("click", function (ev) { ev.preventDefault(); decide(target, action); });
      target.buttons.push(b);
      where.appendChild(b);
    });
  }

  function decide(target, action) {
    var msg = target.msg;
    var reason = target.textarea.value.trim();
    if (reason.length < 3) { msg.textContent = "Write a reason (at least 3 characters)."; return; }
    var plan = encodeURIComponent(target.plan), version = target.version;
    var url, body = { reason: reason };
    if (action === "approve" || action === "reject") {
      url = "/v1/plans/" + plan + "/versions/" + version + "/" + action;
    } else if (action === "activate") {
      url = "/v1/plans/" + plan + "/activate";
      body.version = version;
      body.expected_revision = target.revision;
    } else {
      url = "/v1/plans/" + plan + "/rollback";
      body.expected_revision = target.revision;
    }
    var buttons = target.buttons;
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
    load();
  });
})();
