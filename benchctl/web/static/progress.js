// Live progress of a run: poll the small JSON endpoint and update the counts in place.
(function () {
  "use strict";
  var live = document.getElementById("live");
  if (!live) { return; }
  var runId = live.getAttribute("data-run");
  var every = parseInt(live.getAttribute("data-poll-ms"), 10) || 1000;
  function text(id, value) { var el = document.getElementById(id); if (el) { el.textContent = value; } }
  function tick() {
    fetch("/api/runs/" + encodeURIComponent(runId) + "/progress", { credentials: "same-origin", cache: "no-store" })
      .then(function (r) { return r.ok ? r.json() : null; })
      .then(function (p) {
        if (!p) { return; }
        text("points-done", String(p.points));
        var status = document.getElementById("run-status");
        if (status) { status.textContent = p.status; status.className = "pill " + p.status; }
        if (p.planned_total !== null && p.planned_total !== undefined) {
          text("planned", p.planned_done + " of " + p.planned_total);
          var bar = document.getElementById("bar");
          if (bar && p.planned_total > 0) { bar.style.width = (100 * p.planned_done / p.planned_total).toFixed(1) + "%"; }
        }
        text("run-message", p.message || "");
        live.setAttribute("data-status", p.status);
        if (p.status === "running") { window.setTimeout(tick, every); }
      })
      .catch(function () { window.setTimeout(tick, 3 * every); });
  }
  if (live.getAttribute("data-status") === "running") { window.setTimeout(tick, every); }
})();
