// Keeps the operator page current: polls the snapshot and, when its digest
// changes, swaps in a freshly rendered page body. Without this script the
// page is complete, only not live.
"use strict";
(function () {
  var pulse = document.getElementById("pulse");
  var main = document.querySelector("main[data-digest]");
  if (!main || !pulse) return;
  var every = Number(main.getAttribute("data-refresh-ms"));
  if (!(every > 0)) return;
  var snapshotURL = location.pathname.replace(/\/+$/, "") + "/snapshot.json" + location.search;
  var opts = { cache: "no-store", credentials: "same-origin" };

  function show(state, text) {
    pulse.setAttribute("data-state", state);
    pulse.textContent = text;
  }
  function clock(iso) {
    return new Date(iso).toISOString().slice(11, 19) + " UTC";
  }

  function tick() {
    fetch(snapshotURL, opts)
      .then(function (r) {
        if (!r.ok) throw new Error("snapshot " + r.status);
        return r.json();
      })
      .then(function (snap) {
        if (snap.digest === main.getAttribute("data-digest")) {
          show("live", "live · " + clock(snap.taken));
          return;
        }
        return fetch(location.href, opts)
          .then(function (r) {
            if (!r.ok) throw new Error("page " + r.status);
            return r.text();
          })
          .then(function (html) {
            var fresh = new DOMParser().parseFromString(html, "text/html").querySelector("main[data-digest]");
            if (!fresh) throw new Error("page without figures");
            main.replaceWith(fresh);
            main = fresh;
            show("live", "live · " + clock(fresh.getAttribute("data-taken")));
          });
      })
      .catch(function (err) {
        show("stale", "not updating: " + err.message);
      })
      .then(function () {
        setTimeout(tick, every);
      });
  }
  setTimeout(tick, every);
})();
