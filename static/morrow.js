// Draws every chart whose figure JSON sits in <script type="application/json" id="X-data">
// into the element with id X, and makes tables with class "sortable" sortable by heading.
// No inline script anywhere: the Content-Security-Policy forbids it.
(function () {
  "use strict";
  // Offline and clinical: no plotting-library logo, no sending or editing a chart in anyone's
  // cloud, no link out; only zoom, pan, reset and the PNG download stay in the toolbar.
  // (Plotly.js 4 shows "Share chart..." unless showSendToCloud is false; the other two
  // switches are the older releases' names for the same buttons.)
  var PLOT_CONFIG = {displaylogo: false, responsive: true, showLink: false,
    showSendToCloud: false, showEditInChartStudio: false, plotlyServerURL: "", showTips: false,
    modeBarButtonsToRemove: ["sendChartToCloud", "sendDataToCloud", "editInChartStudio",
      "lasso2d", "select2d", "toggleSpikelines", "hoverClosestCartesian",
      "hoverCompareCartesian"]};
  function drawCharts() {
    document.querySelectorAll('script[type="application/json"][id$="-data"]').forEach(function (node) {
      var target = document.getElementById(node.id.slice(0, -5));
      if (!target || typeof Plotly === "undefined") { return; }
      var figure = JSON.parse(node.textContent);
      Plotly.newPlot(target, figure.data, figure.layout, PLOT_CONFIG);
    });
  }
  function cellValue(row, index, kind) {
    var cell = row.children[index];
    var raw = cell.getAttribute("data-value");
    if (kind === "num") { return parseFloat(raw !== null ? raw : cell.textContent) || 0; }
    return cell.textContent.trim().toLowerCase();
  }
  function makeSortable(table) {
    table.querySelectorAll("th[data-sort]").forEach(function (th, index) {
      th.tabIndex = 0;
      th.setAttribute("role", "button");
      th.title = "Sort by " + th.textContent;
      var ascending = true;
      function sort() {
        var body = table.tBodies[0];
        var rows = Array.prototype.slice.call(body.rows);
        var kind = th.getAttribute("data-sort");
        rows.sort(function (a, b) {
          var x = cellValue(a, index, kind), y = cellValue(b, index, kind);
          return (x < y ? -1 : x > y ? 1 : 0) * (ascending ? 1 : -1);
        });
        rows.forEach(function (r) { body.appendChild(r); });
        table.querySelectorAll("th").forEach(function (h) { h.removeAttribute("aria-sort"); });
        th.setAttribute("aria-sort", ascending ? "ascending" : "descending");
        ascending = !ascending;
      }
      th.addEventListener("click", sort);
      th.addEventListener("keydown", function (e) { if (e.key === "Enter" || e.key === " ") { e.preventDefault(); sort(); } });
    });
  }
  document.addEventListener("DOMContentLoaded", function () {
    drawCharts();
    document.querySelectorAll("table.sortable").forEach(makeSortable);
  });
})();
