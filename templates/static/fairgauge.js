/* fairgauge: small improvements for readers with JavaScript. Every page works without it.
 *  - tables inside an element with class "fg-sortable" get sort buttons on their column heads
 *    and a filter box (by unit name or kind) and a group filter;
 *  - the search page filters the site's page list as you type.
 * No data leaves the page; nothing is loaded from elsewhere.
 */
(function () {
  "use strict";

  function number(text) {
    var m = text.replace(/,/g, "").match(/-?\d+(\.\d+)?/);
    return m ? parseFloat(m[0]) : null;
  }

  function cellText(row, i) {
    var cell = row.cells[i];
    return cell ? cell.textContent.trim() : "";
  }

  function compare(i, numeric, dir) {
    return function (a, b) {
      var x = cellText(a, i), y = cellText(b, i);
      if (numeric) {
        var nx = number(x), ny = number(y);
        if (nx === null && ny === null) return x.localeCompare(y);
        if (nx === null) return 1;   /* rows without a number (too few cases) always last */
        if (ny === null) return -1;
        return dir * (nx - ny) || x.localeCompare(y);
      }
      return dir * x.localeCompare(y, undefined, { sensitivity: "base", numeric: true });
    };
  }

  function isNumericColumn(rows, i) {
    var seen = 0, numeric = 0;
    rows.forEach(function (r) {
      var t = cellText(r, i);
      if (t) { seen += 1; if (/^[-+]?[\d.,]+/.test(t)) numeric += 1; }
    });
    return seen > 0 && numeric / seen > 0.5;
  }

  function sortable(wrapper) {
    var table = wrapper.querySelector("table");
    if (!table || !table.tBodies.length) return;
    var body = table.tBodies[0];
    var rows = Array.prototype.slice.call(body.rows);
    var heads = table.tHead ? Array.prototype.slice.call(table.tHead.rows[0].cells) : [];
    var status = document.createElement("p");
    status.className = "fg-status";
    status.setAttribute("aria-live", "polite");

    heads.forEach(function (th, i) {
      var label = th.textContent.trim();
      var button = document.createElement("button");
      button.type = "button";
      button.className = "fg-sort";
      button.textContent = label;
      button.setAttribute("aria-label", "Sort by " + label);
      th.textContent = "";
      th.appendChild(button);
      var numeric = isNumericColumn(rows, i);
      button.addEventListener("click", function () {
        var dir = th.getAttribute("aria-sort") === "ascending" ? -1 : 1;
        heads.forEach(function (h) { h.removeAttribute("aria-sort"); });
        th.setAttribute("aria-sort", dir === 1 ? "ascending" : "descending");
        rows.sort(compare(i, numeric, dir));
        rows.forEach(function (r) { body.appendChild(r); });
        status.textContent = "Sorted by " + label + (dir === 1 ? ", lowest first." : ", highest first.");
      });
    });

    var form = document.createElement("div");
    form.className = "fg-filter";
    var id = (wrapper.id || "table") + "-filter";
    form.innerHTML =
      '<label for="' + id + '">Show units whose name or kind contains</label> ' +
      '<input type="search" id="' + id + '" autocomplete="off"> ' +
      '<label for="' + id + '-group">Group</label> ' +
      '<select id="' + id + '-group">' +
      '<option value="">Any group</option>' +
      '<option value="Stands out as worse">Stands out as worse on a measure</option>' +
      '<option value="Stands out as better">Stands out as better on a measure</option>' +
      '</select>';
    wrapper.insertBefore(form, table);
    wrapper.insertBefore(status, table);
    var input = form.querySelector("input"), select = form.querySelector("select");
    function apply() {
      var q = input.value.trim().toLowerCase(), g = select.value, shown = 0;
      rows.forEach(function (r) {
        var who = (cellText(r, 0) + " " + cellText(r, 1)).toLowerCase();
        var ok = (!q || who.indexOf(q) !== -1) && (!g || r.textContent.indexOf(g) !== -1);
        r.hidden = !ok;
        if (ok) shown += 1;
      });
      status.textContent = "Showing " + shown + " of " + rows.length + " units.";
    }
    input.addEventListener("input", apply);
    select.addEventListener("change", apply);
  }

  function search() {
    var box = document.getElementById("fg-search-box");
    var list = document.getElementById("fg-search-results");
    var index = window.FAIRGAUGE_INDEX;
    if (!box || !list || !index) return;
    var status = document.getElementById("fg-search-status");
    var up = list.getAttribute("data-up") || "";
    function show() {
      var words = box.value.toLowerCase().split(/\s+/).filter(Boolean);
      list.textContent = "";
      var hits = index.filter(function (p) {
        var text = (p.title + " " + p.text).toLowerCase();
        return words.every(function (w) { return text.indexOf(w) !== -1; });
      });
      hits.forEach(function (p) {
        var li = document.createElement("li");
        var a = document.createElement("a");
        a.href = up + p.url;
        a.textContent = p.title;
        li.appendChild(a);
        list.appendChild(li);
      });
      status.textContent = words.length ? hits.length + " pages match." : "All " + hits.length + " pages.";
    }
    var q = new URLSearchParams(window.location.search).get("q");
    if (q) box.value = q;
    box.addEventListener("input", show);
    show();
  }

  document.addEventListener("DOMContentLoaded", function () {
    Array.prototype.forEach.call(document.querySelectorAll(".fg-sortable"), sortable);
    search();
  });
})();
