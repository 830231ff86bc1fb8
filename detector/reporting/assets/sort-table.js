// Sort the rows of every table.sortable by a click (or Enter) on a column's header: once
// ascending, again descending. Numeric columns (data-type="number") sort by value, others as text.
document.querySelectorAll("table.sortable").forEach(function (table) {
  var heads = table.tHead.rows[0].cells;
  Array.prototype.forEach.call(heads, function (th, col) {
    th.tabIndex = 0;
    th.setAttribute("aria-sort", "none");
    function sort() {
      var body = table.tBodies[0];
      var rows = Array.prototype.slice.call(body.rows);
      var up = th.getAttribute("aria-sort") !== "ascending";
      var numeric = th.getAttribute("data-type") === "number";
      rows.sort(function (a, b) {
        var x = a.cells[col].textContent, y = b.cells[col].textContent;
        var c = numeric ? parseFloat(x) - parseFloat(y) : x.localeCompare(y);
        return up ? c : -c;
      });
      Array.prototype.forEach.call(heads, function (h) { h.setAttribute("aria-sort", "none"); });
      th.setAttribute("aria-sort", up ? "ascending" : "descending");
      rows.forEach(function (row) { body.appendChild(row); });
    }
    th.addEventListener("click", sort);
    th.addEventListener("keydown", function (event) {
      if (event.key === "Enter" || event.key === " ") { event.preventDefault(); sort(); }
    });
  });
});
