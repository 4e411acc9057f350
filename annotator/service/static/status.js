// The status page works without this script; with it, the page refreshes itself (every
// data-refresh milliseconds while visible) and the abort/delete buttons ask for a
// confirmation in a dialog instead of on a page of their own.
(function () {
  "use strict";

  function refresh() {
    var live = document.getElementById("live");
    var every = live ? parseInt(live.getAttribute("data-refresh"), 10) : 0;
    if (!every) { return; }
    window.setTimeout(function tick() {
      if (document.hidden) { window.setTimeout(tick, every); return; }
      fetch(window.location.href, { credentials: "same-origin", cache: "no-store" })
        .then(function (r) {
          if (r.redirected || !r.ok) { throw new Error("status " + r.status); }
          return r.text();
        })
        .then(function (html) {
          var doc = new DOMParser().parseFromString(html, "text/html");
          var fresh = doc.getElementById("live");
          var stamp = doc.getElementById("stamp");
          if (fresh) {
            live.innerHTML = fresh.innerHTML;
            live.setAttribute("data-refresh", fresh.getAttribute("data-refresh"));
          }
          if (stamp) { document.getElementById("stamp").textContent = stamp.textContent; }
          live.removeAttribute("data-stale");
        })
        .catch(function () { live.setAttribute("data-stale", "1"); })
        .then(function () {
          var next = parseInt(live.getAttribute("data-refresh"), 10);
          if (next) { window.setTimeout(tick, next); }
        });
    }, every);
  }

  document.addEventListener("submit", function (event) {
    var form = event.target;
    var question = form.getAttribute("data-confirm");
    if (!question) { return; }
    if (!window.confirm(question)) { event.preventDefault(); return; }
    var yes = document.createElement("input");
    yes.type = "hidden"; yes.name = "confirmed"; yes.value = "yes";
    form.appendChild(yes);
  });

  document.addEventListener("DOMContentLoaded", refresh);
}());
