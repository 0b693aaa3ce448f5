// watchdog-edge page: ask once a second whether anything changed; if so, fetch the fresh main part.
// It only reads (GET); the page works without it, just without refreshing itself.
"use strict";
(function () {
  var main = document.getElementById("main");
  var stamp = document.getElementById("updated");
  if (!main || !window.fetch) { return; }
  var span = main.getAttribute("data-span") || "";
  var busy = false;

  function current() {
    var live = document.getElementById("live");
    return live ? live.getAttribute("data-version") : "";
  }
  function say(text) { if (stamp) { stamp.textContent = text; } }
  function clock() { return new Date().toISOString().slice(11, 19) + " UTC"; }

  function check() {
    if (busy) { return; }
    busy = true;
    fetch("/api/version", { cache: "no-store", credentials: "same-origin" })
      .then(function (r) { if (!r.ok) { throw new Error("HTTP " + r.status); } return r.json(); })
      .then(function (v) {
        if (v.version === current()) { say("checked " + clock()); return null; }
        return fetch("/fragment?span=" + encodeURIComponent(span), { cache: "no-store", credentials: "same-origin" })
          .then(function (r) { if (!r.ok) { throw new Error("HTTP " + r.status); } return r.text(); })
          .then(function (html) { main.innerHTML = html; say("updated " + clock()); });
      })
      .catch(function (e) { say("cannot reach the page process (" + e.message + "); showing what came last"); })
      .then(function () { busy = false; });
  }
  window.setInterval(check, 1000);
})();
