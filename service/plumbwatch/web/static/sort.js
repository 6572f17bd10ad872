// Sorts tables in place when a column heading is clicked; without this script the
// headings are links that sort on the server, so the page works either way.
(function () {
  "use strict";
  function key(cell) {
    var raw = cell ? cell.getAttribute("data-sort") : "";
    if (raw === null) { raw = cell.textContent.trim(); }
    var number = parseFloat(raw);
    return raw !== "" && isFinite(number) && String(number) !== "NaN" && /^[-+0-9.eE]+$/.test(raw)
      ? { blank: false, num: number, text: raw } : { blank: raw === "", num: null, text: raw };
  }
  function sortBy(table, th) {
    var headers = Array.prototype.slice.call(th.parentNode.children);
    var index = headers.indexOf(th);
    var descending = th.getAttribute("aria-sort") === "ascending";
    headers.forEach(function (h) { h.setAttribute("aria-sort", "none"); });
    th.setAttribute("aria-sort", descending ? "descending" : "ascending");
    var body = table.tBodies[0];
    var rows = Array.prototype.slice.call(body.rows);
    rows.sort(function (a, b) {
      var x = key(a.cells[index]), y = key(b.cells[index]);
      if (x.blank !== y.blank) { return x.blank ? 1 : -1; }  // blanks last either way
      var c = (x.num !== null && y.num !== null) ? x.num - y.num : x.text.localeCompare(y.text);
      return descending ? -c : c;
    });
    rows.forEach(function (r) { body.appendChild(r); });
  }
  document.addEventListener("click", function (event) {
    var link = event.target.closest("table.sortable thead th a");
    if (!link) { return; }
    event.preventDefault();
    sortBy(link.closest("table"), link.closest("th"));
  });
})();
