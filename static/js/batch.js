// The many-tanks screen (feedings, water changes): typing in a row ticks it, and two buttons tick or
// untick every row. The page works without this script (tick the rows by hand).
(function () {
  "use strict";

  var form = document.getElementById("batch-form");
  var ticks = form ? form.querySelectorAll(".batchrow input[name$='-record']") : [];
  if (!ticks.length) return;

  form.addEventListener("input", function (event) {
    var row = event.target.closest(".batchrow");
    if (!row || event.target.type === "checkbox") return;
    var tick = row.querySelector("input[name$='-record']");
    if (tick) tick.checked = true;
  });

  var bar = document.createElement("div");
  bar.className = "tick-all";
  [["Tick all", true], ["Untick all", false]].forEach(function (pair) {
    var button = document.createElement("button");
    button.type = "button";
    button.className = "btn";
    button.textContent = pair[0];
    button.addEventListener("click", function () {
      ticks.forEach(function (tick) { tick.checked = pair[1]; });
    });
    bar.appendChild(button);
  });
  form.prepend(bar);
})();
