// Tikhon overview: keeps the "Training jobs" table current by polling the trainings JSON (same origin,
// the sign-in cookie goes along). Builds rows with textContent only, never HTML from data.
(function () {
  "use strict";
  var FINAL = { succeeded: true, failed: true, cancelled: true };

  function el(tag, attrs, text) {
    var node = document.createElement(tag);
    for (var k in attrs || {}) node.setAttribute(k, attrs[k]);
    if (text !== undefined && text !== null) node.textContent = String(text);
    return node;
  }

  function when(iso) {
    if (!iso) return document.createTextNode("—");
    var t = new Date(iso);
    if (isNaN(t.getTime())) return document.createTextNode(String(iso));
    var p = function (n) { return (n < 10 ? "0" : "") + n; };
    var text = t.getUTCFullYear() + "-" + p(t.getUTCMonth() + 1) + "-" + p(t.getUTCDate()) + " " +
      p(t.getUTCHours()) + ":" + p(t.getUTCMinutes()) + " UTC";
    return el("time", { datetime: iso }, text);
  }

  function progressCell(job) {
    var td = el("td");
    var prog = job.progress || {};
    var done = prog.done || 0, total = prog.total;
    if (total) {
      td.appendChild(el("progress", { max: total, value: done }));
      td.appendChild(document.createTextNode(" "));
      td.appendChild(el("span", { "class": "num" }, done + "/" + total + " (" + Math.round(100 * done / total) + "%)"));
    } else {
      var idle = { queued: "waiting for a worker", running: "preparing the data" };
      td.appendChild(el("span", { "class": "muted" }, idle[job.state] || "—"));
    }
    return td;
  }

  function outcomeCell(job, deleted) {
    var td = el("td");
    if (job.state === "succeeded") {
      var d = job.decision || {};
      td.appendChild(document.createTextNode("version " + job.version));
      if (deleted && deleted[job.model + "@" + job.version]) {
        td.appendChild(document.createTextNode(" "));
        td.appendChild(el("span", { "class": "muted" }, "(since deleted)"));
      }
      var text = "";
      if (d.went_live === true) text += " · went live";
      else if (d.went_live === false) text += " · not made live";
      td.appendChild(document.createTextNode(text));
      if (d.reason) td.appendChild(el("div", { "class": "reason" }, d.reason));
    } else if (job.state === "failed") {
      var p = job.problem || {};
      td.appendChild(el("span", { "class": "bad" }, p.detail || p.title || "failed"));
    } else if (job.state === "cancelled") {
      td.appendChild(el("span", { "class": "muted" }, "cancelled"));
    }
    return td;
  }

  function row(job, showModel, deleted) {
    var tr = el("tr", { "data-job": job.id, "data-state": job.state });
    tr.appendChild(el("td", { "class": "mono" }, String(job.id).slice(0, 8)));
    if (showModel) {
      var td = el("td");
      td.appendChild(el("a", { href: "/models/" + encodeURIComponent(job.model) }, job.model));
      tr.appendChild(td);
    }
    var st = el("td");
    st.appendChild(el("span", { "class": "state state-" + job.state }, job.state));
    tr.appendChild(st);
    tr.appendChild(progressCell(job));
    var c = el("td"); c.appendChild(when(job.created_at)); tr.appendChild(c);
    var f = el("td"); f.appendChild(when(job.finished_at)); tr.appendChild(f);
    tr.appendChild(outcomeCell(job, deleted));
    return tr;
  }

  function start(section) {
    var source = section.getAttribute("data-source");
    var limit = parseInt(section.getAttribute("data-limit") || "15", 10);
    var model = section.getAttribute("data-model");
    var tbody = section.querySelector("tbody");
    var status = section.querySelector("[data-status]");
    var notice = section.querySelector("[data-notice]");
    var watching = {};  // ids of jobs seen queued or running while this page is open
    var known = {};  // ids of jobs already listed when the page was rendered, or announced since
    Array.prototype.forEach.call(tbody.querySelectorAll("tr[data-job]"), function (tr) {
      known[tr.getAttribute("data-job")] = true;
      if (!FINAL[tr.getAttribute("data-state")]) watching[tr.getAttribute("data-job")] = true;
    });
    var failures = 0;
    var deleted = {};  // "model@version" of versions deleted since their job (rendered by the server)
    try {
      JSON.parse(section.getAttribute("data-deleted") || "[]").forEach(function (k) { deleted[k] = true; });
    } catch (e) { deleted = {}; }
    // While a job runs the table refreshes every second; when none runs the checks back off (3 s, 6 s,
    // 12 s ... up to a minute), and a new job brings the pace back to one second.
    var IDLE_FIRST = 3000, IDLE_MAX = 60000;
    var idleDelay = IDLE_FIRST;

    function render(jobs) {
      var frag = document.createDocumentFragment();
      jobs.slice(0, limit).forEach(function (job) { frag.appendChild(row(job, !model, deleted)); });
      tbody.replaceChildren(frag);
      var empty = section.querySelector("[data-empty]");
      if (empty) empty.hidden = jobs.length > 0;
      jobs.forEach(function (j) {
        if (!FINAL[j.state]) { watching[j.id] = true; known[j.id] = true; return; }
        // a job that ended while this page was open: seen running, or new since the page was rendered (a
        // short job can start and finish between two checks while the page checks rarely)
        if (!watching[j.id] && known[j.id]) return;
        delete watching[j.id];
        known[j.id] = true;
        if (j.state === "succeeded" && j.version && notice) announce(j);
      });
    }

    function announce(j) {
      notice.replaceChildren();
      notice.appendChild(document.createTextNode("Job " + String(j.id).slice(0, 8) + " published version " + j.version +
        (j.decision && j.decision.went_live ? " and made it live. " : ". ")));
      notice.appendChild(el("a", { href: "/models/" + encodeURIComponent(j.model) + "?version=" + j.version },
        "Show version " + j.version));
      notice.hidden = false;
    }

    function poll() {
      fetch(source, { credentials: "same-origin", headers: { Accept: "application/json" }, cache: "no-store" })
        .then(function (r) {
          if (!r.ok) throw new Error("HTTP " + r.status);
          return r.json();
        })
        .then(function (body) {
          failures = 0;
          var jobs = body.trainings || [];
          render(jobs);
          var active = jobs.some(function (j) { return !FINAL[j.state]; });
          section.setAttribute("data-active", active ? "yes" : "no");
          var delay = 1000;
          if (active) {
            idleDelay = IDLE_FIRST;
          } else {
            delay = idleDelay;
            idleDelay = Math.min(IDLE_MAX, idleDelay * 2);
          }
          section.setAttribute("data-next-check-ms", String(delay));
          if (status) status.textContent = active ? "Updating every second." :
            "No job is running; next check in " + Math.round(delay / 1000) + " s.";
          setTimeout(poll, delay);
        })
        .catch(function (err) {
          failures += 1;
          if (status) status.textContent = "Could not refresh (" + err.message + "); retrying.";
          setTimeout(poll, Math.min(30000, 2000 * failures));
        });
    }
    poll();
  }

  document.addEventListener("DOMContentLoaded", function () {
    var section = document.getElementById("jobs");
    if (section && window.fetch) start(section);
  });
})();
