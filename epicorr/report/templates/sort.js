(function () {
  "use strict";
  function key(cell) {
    var v = cell.getAttribute("data-sort");
    if (v === null) { v = cell.textContent.trim(); }
    if (v === "") { return { empty: true }; }
    var n = Number(v);
    return isNaN(n) ? { text: v.toLowerCase() } : { num: n };
  }
  function compare(a, b, dir) {
    if (a.empty || b.empty) { return a.empty && b.empty ? 0 : a.empty ? 1 : -1; }  // blanks last
    var r = ("num" in a && "num" in b) ? a.num - b.num :
      String("num" in a ? a.num : a.text).localeCompare(String("num" in b ? b.num : b.text));
    return dir * r;
  }
  document.querySelectorAll("table.sortable").forEach(function (table) {
    var heads = table.querySelectorAll("thead th");
    var body = table.tBodies[0];
    heads.forEach(function (th, col) {
      var btn = th.querySelector("button");
      if (!btn) { return; }
      btn.addEventListener("click", function () {
        var current = th.getAttribute("aria-sort");
        var first = th.getAttribute("data-first") || "ascending";
        var next = current === "ascending" ? "descending" : current === "descending" ? "ascending" : first;
        heads.forEach(function (h) { h.removeAttribute("aria-sort"); });
        th.setAttribute("aria-sort", next);
        var dir = next === "ascending" ? 1 : -1;
        var rows = Array.prototype.slice.call(body.rows);
        rows.forEach(function (r, i) { r._i = i; });
        rows.sort(function (ra, rb) {
          return compare(key(ra.cells[col]), key(rb.cells[col]), dir) || ra._i - rb._i;
        });
        rows.forEach(function (r) { body.appendChild(r); });
      });
    });
  });
})();
