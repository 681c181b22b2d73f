// Trialogue researcher console: refreshes the live monitor from its JSON
// address without reloading the page, and copies hashes. Text goes in with
// textContent only, never as HTML.
(function () {
  "use strict";

  document.querySelectorAll("button[data-copy]").forEach(function (b) {
    b.addEventListener("click", function () {
      var el = document.getElementById(b.getAttribute("data-copy"));
      if (!el) return;
      var text = el.textContent.trim();
      var done = function () { b.textContent = "Copied"; };
      if (navigator.clipboard && window.isSecureContext) {
        navigator.clipboard.writeText(text).then(done, function () { select(el); });
      } else {
        select(el);
      }
    });
  });

  function select(el) {
    var range = document.createRange();
    range.selectNodeContents(el);
    var sel = window.getSelection();
    sel.removeAllRanges();
    sel.addRange(range);
  }

  var root = document.querySelector("[data-monitor]");
  if (root) monitor(root);

  function monitor(root) {
    var url = root.getAttribute("data-json");
    var chartBase = root.getAttribute("data-chart");
    var every = parseInt(root.getAttribute("data-refresh-ms"), 10) || 5000;
    var chart = document.getElementById("entries-chart");
    var status = document.getElementById("monitor-status");
    var flag = document.getElementById("dropout-flag");
    var timer = 0, busy = false;

    function setText(field, value) {
      root.querySelectorAll('[data-field="' + field + '"]').forEach(function (el) {
        if (el.textContent !== value) el.textContent = value;
      });
    }

    function setRows(id, rows) {
      var body = document.getElementById(id);
      if (!body) return;
      var frag = document.createDocumentFragment();
      rows.forEach(function (cells) {
        var tr = document.createElement("tr");
        cells.forEach(function (c, i) {
          var cell = document.createElement(i === 0 ? "th" : "td");
          if (i === 0) cell.scope = "row";
          cell.textContent = c;
          tr.appendChild(cell);
        });
        frag.appendChild(tr);
      });
      body.replaceChildren(frag);
    }

    function apply(d) {
      Object.keys(d.text).forEach(function (k) { setText(k, d.text[k]); });
      setRows("arm-rows", d.arms.map(function (a) { return a.cells; }));
      setRows("strata-rows", d.strata.map(function (s) { return s.cells; }));
      if (flag) flag.classList.toggle("alert", !!d.dropout_test.differs);
      if (chart && root.getAttribute("data-generated") !== d.generated) {
        chart.src = chartBase + "&t=" + encodeURIComponent(d.generated);
        chart.alt = "Entries over time: " + d.chart_alt;
      }
      root.setAttribute("data-generated", d.generated);
      root.setAttribute("data-refreshed", String((parseInt(root.getAttribute("data-refreshed"), 10) || 0) + 1));
    }

    function tick() {
      if (busy || document.hidden) { schedule(); return; }
      busy = true;
      fetch(url, { headers: { Accept: "application/json" }, credentials: "same-origin", cache: "no-store" })
        .then(function (r) {
          return r.json().then(function (d) { return { ok: r.ok, d: d }; });
        })
        .then(function (x) {
          if (!x.ok) {
            status.textContent = (x.d && x.d.error) || "The monitor could not be refreshed.";
            return;
          }
          status.textContent = "";
          apply(x.d);
        })
        .catch(function () {
          status.textContent = "The monitor could not be refreshed; it will try again.";
        })
        .then(function () { busy = false; schedule(); });
    }

    function schedule() {
      clearTimeout(timer);
      timer = setTimeout(tick, every);
    }

    document.addEventListener("visibilitychange", function () {
      if (!document.hidden) { clearTimeout(timer); tick(); }
    });
    schedule();
  }
})();
