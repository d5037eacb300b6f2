/* Stationfit: client-side sorting of result tables. No inline scripts; loaded with defer. */
(function () {
  "use strict";

  var collator = new Intl.Collator(undefined, { numeric: true, sensitivity: "base" });

  function cellKey(row, index, type) {
    var cell = row.cells[index];
    if (!cell) { return null; }
    var raw = cell.hasAttribute("data-sort-value") ? cell.getAttribute("data-sort-value") : cell.textContent.trim();
    if (type === "text") { return raw === "" || raw === "\u2014" ? null : raw; }
    if (raw === "" || raw === "\u2014") { return null; }
    var value = parseFloat(raw);
    if (!isFinite(value)) { return null; }
    return type === "abs" ? Math.abs(value) : value;
  }

  function compare(a, b, type) {
    if (type === "text") { return collator.compare(a, b); }
    return a - b;
  }

  function sortBy(table, header, index, direction) {
    var type = header.getAttribute("data-sort-type");
    var body = table.tBodies[0];
    var rows = Array.prototype.slice.call(body.rows);
    var keyed = rows.map(function (row, position) {
      return { row: row, key: cellKey(row, index, type), position: position };
    });
    var sign = direction === "descending" ? -1 : 1;
    keyed.sort(function (a, b) {
      // rows without a value (not applicable) always go last; ties keep file order
      if (a.key === null && b.key === null) { return a.position - b.position; }
      if (a.key === null) { return 1; }
      if (b.key === null) { return -1; }
      var order = compare(a.key, b.key, type) * sign;
      return order !== 0 ? order : a.position - b.position;
    });
    var fragment = document.createDocumentFragment();
    keyed.forEach(function (item) { fragment.appendChild(item.row); });
    body.appendChild(fragment);

    Array.prototype.forEach.call(table.tHead.rows[0].cells, function (th) {
      if (th.hasAttribute("data-sort-type")) { th.setAttribute("aria-sort", "none"); }
    });
    header.setAttribute("aria-sort", direction);
    var status = table.parentNode.querySelector(".sort-status");
    if (status) {
      var label = header.getAttribute("data-sort-label") || header.textContent.trim();
      status.textContent = "Sorted by " + label + (direction === "descending" ? ", largest first" : ", smallest first");
    }
  }

  function enhance(table) {
    if (!table.tHead || !table.tBodies.length) { return; }
    var status = document.createElement("p");
    status.className = "sort-status visually-hidden";
    status.setAttribute("aria-live", "polite");
    table.parentNode.insertBefore(status, table.nextSibling);

    Array.prototype.forEach.call(table.tHead.rows[0].cells, function (th, index) {
      var type = th.getAttribute("data-sort-type");
      if (!type) { return; }
      var button = document.createElement("button");
      button.type = "button";
      button.className = "sort-button";
      while (th.firstChild) { button.appendChild(th.firstChild); }
      if (type === "abs") { th.setAttribute("data-sort-label", "|" + button.textContent.trim() + "|"); }
      var title = th.getAttribute("title");
      button.title = title ? title : "Sort by this column";
      th.appendChild(button);
      th.setAttribute("aria-sort", "none");
      button.addEventListener("click", function () {
        var current = th.getAttribute("aria-sort");
        var first = th.getAttribute("data-sort-first") === "desc" ? "descending" : "ascending";
        var next = current === "none" ? first : (current === "ascending" ? "descending" : "ascending");
        sortBy(table, th, index, next);
      });
    });
  }

  function start() {
    Array.prototype.forEach.call(document.querySelectorAll("table[data-sortable]"), enhance);
  }

  if (document.readyState === "loading") {
    document.addEventListener("DOMContentLoaded", start);
  } else {
    start();
  }
})();
