// Live range highlighting on the entry forms (daily round and tank page).
// Each reading input carries data-low / data-high (the tank's care target) and data-min / data-max
// (physical bounds). The server applies the same rules on save; this only shows them while typing.
(function () {
  "use strict";

  function parse(text) {
    var t = (text || "").trim().replace(",", ".");
    if (t === "") return null;
    var n = Number(t);
    return isFinite(n) ? n : NaN;
  }

  function evaluate(input) {
    var cell = input.closest(".reading-cell");
    var live = cell ? cell.querySelector(".live") : null;
    var value = parse(input.value);
    var low = input.dataset.low !== undefined ? Number(input.dataset.low) : null;
    var high = input.dataset.high !== undefined ? Number(input.dataset.high) : null;
    var min = Number(input.dataset.min), max = Number(input.dataset.max);
    var message = "", out = false, impossible = false;
    if (value !== null) {
      if (isNaN(value)) { impossible = true; message = "not a number"; }
      else if (value < min || value > max) { impossible = true; message = "impossible (" + min + "–" + max + ")"; }
      else if (low !== null && value < low) { out = true; message = "▼ below " + input.dataset.target; }
      else if (high !== null && value > high) { out = true; message = "▲ above " + input.dataset.target; }
    }
    input.classList.toggle("is-out", out);
    input.classList.toggle("is-impossible", impossible);
    input.setAttribute("aria-invalid", out || impossible ? "true" : "false");
    if (live) live.textContent = message;
    var row = input.closest(".tankrow");
    if (row) {
      var anyOut = row.querySelector("input.is-out") !== null;
      row.classList.toggle("has-flag", anyOut || row.dataset.serverFlag === "1");
    }
  }

  document.addEventListener("input", function (event) {
    if (event.target.matches("input.reading")) evaluate(event.target);
  });
  document.querySelectorAll("input.reading").forEach(function (input) {
    if (input.value) evaluate(input);
  });
  // The rows are posted as one JSON field by rows_post.js (shared with the many-tanks screen).
})();
