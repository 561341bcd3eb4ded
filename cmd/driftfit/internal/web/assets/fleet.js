// Refreshes the fleet table in place from /api/fleet, and applies the
// filters as they change. Built with DOM calls and textContent only, so
// no sensor id is ever read as markup.
(function () {
  "use strict";
  var form = document.getElementById("filters");
  var body = document.getElementById("fleet-body");
  var live = document.getElementById("live");
  if (!form || !body || !live) { return; }
  var refresh = parseInt(live.getAttribute("data-refresh"), 10) || 0;

  function query() {
    var p = new URLSearchParams(new FormData(form));
    Array.from(p.keys()).forEach(function (k) { if (p.get(k) === "") { p.delete(k); } });
    return p.toString();
  }
  function el(tag, cls, text) {
    var e = document.createElement(tag);
    if (cls) { e.className = cls; }
    if (text !== undefined && text !== null) { e.textContent = text; }
    return e;
  }
  function num(v) {
    if (v === 0) { return "0"; }
    var a = Math.abs(v);
    if (a >= 1e-4 && a < 1e7) { return String(Number(v.toPrecision(5))); }
    return v.toExponential(4);
  }
  var months = ["Jan", "Feb", "Mar", "Apr", "May", "Jun", "Jul", "Aug", "Sep", "Oct", "Nov", "Dec"];
  function when(s) {
    if (!s) { return ""; }
    var d = new Date(s);
    var p = function (n) { return (n < 10 ? "0" : "") + n; };
    return d.getUTCDate() + " " + months[d.getUTCMonth()] + " " + d.getUTCFullYear() + " " + p(d.getUTCHours()) + ":" + p(d.getUTCMinutes()) + " UTC";
  }
  function inDays(s, asof) {
    var d = (new Date(s) - new Date(asof)) / 86400000;
    if (Math.abs(d) < 1 / 24) { return "now"; }
    return d > 0 ? "in " + d.toFixed(1) + " days" : (-d).toFixed(1) + " days ago";
  }
  var svgNS = "http://www.w3.org/2000/svg";
  function meter(share) {
    var s = document.createElementNS(svgNS, "svg");
    s.setAttribute("class", share >= 1 ? "meter over" : "meter"); s.setAttribute("viewBox", "0 0 100 10"); s.setAttribute("preserveAspectRatio", "none");
    var t = document.createElementNS(svgNS, "rect"); t.setAttribute("class", "track"); t.setAttribute("width", "100"); t.setAttribute("height", "10");
    var f = document.createElementNS(svgNS, "rect"); f.setAttribute("class", "fill"); f.setAttribute("width", String(Math.min(Math.max(share, 0), 1) * 100)); f.setAttribute("height", "10");
    s.appendChild(t); s.appendChild(f);
    return s;
  }
  function row(r, asof) {
    var tr = el("tr", "s-" + r.state);
    tr.appendChild(el("td", "rank", r.rank));
    var id = el("td", "id");
    if (r.href) { var a = el("a", null, r.id); a.href = r.href; id.appendChild(a); } else { id.appendChild(el("span", "unlinked", r.id)); }
    tr.appendChild(id);
    tr.appendChild(el("td", null, r.class || ""));
    tr.appendChild(el("td", "state", r.state === "judged" ? "judged" : "not judged because: " + (r.reason || "")));
    var tk = el("td");
    if (r.ticket) {
      var rel = inDays(r.ticket.due, asof);
      if (new Date(r.ticket.due) < new Date(asof)) { rel = "overdue " + rel.replace(/ ago$/, ""); }
      tk.appendChild(el("span", "due sev-" + r.ticket.severity, rel));
      tk.appendChild(el("br")); tk.appendChild(el("small", null, when(r.ticket.due) + " · " + r.ticket.reason));
    }
    tr.appendChild(tk);
    var ex = el("td");
    if (r.exit) {
      ex.appendChild(document.createTextNode(r.exit.kind === "already past" ? "already out (" + r.exit.edge + ")" : inDays(r.exit.at, asof)));
      ex.appendChild(el("br")); ex.appendChild(el("small", null, when(r.exit.at) + " · " + r.exit_window));
    }
    tr.appendChild(ex);
    var tu = el("td");
    if (r.tolerance_used !== undefined) { tu.appendChild(meter(r.tolerance_used)); tu.appendChild(document.createTextNode(" " + Math.round(100 * r.tolerance_used) + "%")); }
    tr.appendChild(tu);
    var dr = el("td");
    if (r.drift_per_day !== undefined) {
      dr.appendChild(document.createTextNode(num(r.drift_per_day) + " " + (r.unit || "") + "/day"));
      dr.appendChild(el("br")); dr.appendChild(el("small", null, num(r.significance) + " SE · " + r.window));
    }
    tr.appendChild(dr);
    var al = el("td");
    (r.alerts || []).forEach(function (x) {
      var b = el("span", "badge sev-" + x.severity, x.kind + " " + x.window); b.title = (x.class || "") + " since " + x.since;
      al.appendChild(b); al.appendChild(document.createTextNode(" "));
    });
    tr.appendChild(al);
    var last = el("td"); last.appendChild(el("small", null, when(r.last))); tr.appendChild(last);
    return tr;
  }
  var busy = false;
  function load() {
    if (busy) { return; }
    busy = true;
    fetch("/api/fleet?" + query(), { credentials: "same-origin", headers: { "Accept": "application/json" } })
      .then(function (res) { if (!res.ok) { throw new Error("HTTP " + res.status); } return res.json(); })
      .then(function (f) {
        var rows = document.createDocumentFragment();
        f.sensors.forEach(function (r) { rows.appendChild(row(r, f.as_of)); });
        if (!f.sensors.length) { var tr = el("tr"); var td = el("td", "empty", "No sensor matches."); td.colSpan = 10; tr.appendChild(td); rows.appendChild(tr); }
        body.replaceChildren(rows);
        Object.keys(f.counts).forEach(function (k) {
          var b = document.querySelector('[data-count="' + k + '"]');
          if (b) { b.textContent = f.counts[k]; }
        });
        document.getElementById("shown").textContent = f.counts.shown + " shown";
        live.textContent = "updated " + when(f.as_of);
        live.classList.remove("stale");
        body.setAttribute("data-updated", f.as_of);
      })
      .catch(function (e) { live.textContent = "refresh failed: " + e.message; live.classList.add("stale"); })
      .finally(function () { busy = false; });
  }
  var timer = null;
  form.addEventListener("input", function () {
    clearTimeout(timer);
    timer = setTimeout(function () { history.replaceState(null, "", "/?" + query()); load(); }, 250);
  });
  form.addEventListener("submit", function (ev) { ev.preventDefault(); history.replaceState(null, "", "/?" + query()); load(); });
  if (refresh > 0) { setInterval(load, refresh); }
})();
