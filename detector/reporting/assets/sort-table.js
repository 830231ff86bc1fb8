// Sort the rows of every table.sortable by a click (or Enter) on a column's header: once
// ascending, again descending. Numeric columns (data-type="number") sort by value, others as text;
// a header with data-type="none" does not sort. A "rows-changed" event on the table (sent by a
// script that rewrote its cells) sorts it again by the column last chosen, if any.
document.querySelectorAll("table.sortable").forEach(function (table) {
  var heads = table.tHead.rows[0].cells;
  function apply(th, col, up) {
    var body = table.tBodies[0];
    var rows = Array.prototype.slice.call(body.rows);
    var numeric = th.getAttribute("data-type") === "number";
    rows.sort(function (a, b) {
      var x = a.cells[col].textContent, y = b.cells[col].textContent;
      var c = numeric ? parseFloat(x) - parseFloat(y) : x.localeCompare(y);
      return up ? c : -c;
    });
    Array.prototype.forEach.call(heads, function (h) {
      if (h.hasAttribute("aria-sort")) h.setAttribute("aria-sort", "none");
    });
    th.setAttribute("aria-sort", up ? "ascending" : "descending");
    var same = rows.every(function (row, i) { return body.rows[i] === row; });
    if (same) return;  // already in order: moving thousands of rows costs a layout
    var fragment = document.createDocumentFragment();
    rows.forEach(function (row) { fragment.appendChild(row); });
    body.appendChild(fragment);
  }
  Array.prototype.forEach.call(heads, function (th, col) {
    if (th.getAttribute("data-type") === "none") return;
    th.tabIndex = 0;
    th.setAttribute("aria-sort", "none");
    function sort() { apply(th, col, th.getAttribute("aria-sort") !== "ascending"); }
    th.addEventListener("click", sort);
    th.addEventListener("keydown", function (event) {
      if (event.key === "Enter" || event.key === " ") { event.preventDefault(); sort(); }
    });
  });
  table.addEventListener("rows-changed", function () {
    Array.prototype.forEach.call(heads, function (th, col) {
      var state = th.getAttribute("aria-sort");
      if (state === "ascending" || state === "descending") apply(th, col, state === "ascending");
    });
  });
});
