(function () {
  "use strict";
  var table = document.getElementById("fleet");
  if (!table) { return; }
  var body = table.tBodies[0];
  var rows = Array.prototype.slice.call(body.rows);
  var heads = Array.prototype.slice.call(table.querySelectorAll("th[data-sort]"));
  var filter = document.getElementById("filter");
  var show = document.getElementById("show");
  var shown = document.getElementById("shown");

  function value(row, field) {
    var text = row.getAttribute("data-" + field) || "";
    var n = Number(text);
    return text !== "" && !isNaN(n) ? n : text.toLowerCase();
  }

  function compare(a, b, field) {
    var x = value(a, field), y = value(b, field);
    if (typeof x === "number" && typeof y === "number") { return x < y ? -1 : x > y ? 1 : 0; }
    return String(x).localeCompare(String(y));
  }

  function sortBy(head) {
    var field = head.getAttribute("data-sort");
    var up = head.getAttribute("aria-sort") !== "ascending";
    heads.forEach(function (h) { h.removeAttribute("aria-sort"); });
    head.setAttribute("aria-sort", up ? "ascending" : "descending");
    rows.sort(function (a, b) {
      var c = compare(a, b, field) || compare(a, b, "rank");
      return up ? c : -c;
    });
    rows.forEach(function (r) { body.appendChild(r); });
  }

  function apply() {
    var q = filter.value.trim().toLowerCase();
    var mode = show.value;
    var count = 0;
    rows.forEach(function (r) {
      var ok = (!q || r.getAttribute("data-text").indexOf(q) >= 0) &&
        (mode === "all" || r.getAttribute("data-" + mode) === "1");
      r.hidden = !ok;
      if (ok) { count += 1; }
    });
    shown.textContent = count + " of " + rows.length + " loops shown";
  }

  heads.forEach(function (h) {
    h.querySelector("button").addEventListener("click", function () { sortBy(h); });
  });
  filter.addEventListener("input", apply);
  show.addEventListener("change", apply);
}());
