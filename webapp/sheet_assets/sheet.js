(function () {
  "use strict";
  function data(id) {
    var el = document.getElementById(id);
    return el ? JSON.parse(el.textContent) : null;
  }
  var plots = data("rf-plots") || {};
  var config = {displaylogo: false, responsive: true, showLink: false,
                modeBarButtonsToRemove: ["lasso2d", "select2d", "sendDataToCloud"]};
  var divs = document.querySelectorAll("div.plot[data-plot]");
  Array.prototype.forEach.call(divs, function (div) {
    var p = plots[div.getAttribute("data-plot")];
    if (p && window.Plotly) { window.Plotly.newPlot(div, p.traces, p.layout, config); }
  });
  // A4 at 96 px per inch: 180 mm x 88 mm
  function sizeFor(print) {
    Array.prototype.forEach.call(divs, function (div) {
      if (!div.classList.contains("js-plotly-plot")) { return; }
      if (print) { window.Plotly.relayout(div, {width: 680, height: 332}); }
      else { window.Plotly.relayout(div, {width: null, height: null, autosize: true}); }
    });
  }
  window.addEventListener("beforeprint", function () { sizeFor(true); });
  window.addEventListener("afterprint", function () { sizeFor(false); });
  var printButton = document.getElementById("rf-print");
  if (printButton) { printButton.addEventListener("click", function () { window.print(); }); }
  var saveButton = document.getElementById("rf-save-recipe");
  if (saveButton) {
    saveButton.addEventListener("click", function () {
      var text = JSON.stringify(data("rf-recipe"), null, 2) + "\n";
      var url = URL.createObjectURL(new Blob([text], {type: "application/json"}));
      var a = document.createElement("a");
      a.href = url;
      a.download = saveButton.getAttribute("data-name");
      document.body.appendChild(a);
      a.click();
      document.body.removeChild(a);
      setTimeout(function () { URL.revokeObjectURL(url); }, 0);
    });
  }
})();
