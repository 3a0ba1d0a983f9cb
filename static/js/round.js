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

  // On the round, send the filled inputs of all rows as ONE hidden JSON field and disable the row
  // inputs, so a round of any size is one request with a few fields (Django refuses a request with
  // more than DATA_UPLOAD_MAX_NUMBER_FIELDS fields). Without this script the plain fields are sent.
  var form = document.getElementById("round-form");
  if (form && form.dataset.rowsField) {
    form.addEventListener("submit", function () {
      var rows = {};
      form.querySelectorAll(".tankrow input[name], .tankrow select[name], .tankrow textarea[name]").forEach(function (el) {
        if (el.disabled) return;
        if (el.type === "checkbox") { if (el.checked) rows[el.name] = true; }
        else if (el.value.trim() !== "") rows[el.name] = el.value;
        el.disabled = true;
      });
      var field = form.querySelector("input[name='" + form.dataset.rowsField + "']");
      if (!field) {
        field = document.createElement("input");
        field.type = "hidden";
        field.name = form.dataset.rowsField;
        form.appendChild(field);
      }
      field.value = JSON.stringify(rows);
    });
    // Back-forward cache: a page restored after submit must be editable again.
    window.addEventListener("pageshow", function () {
      form.querySelectorAll(".tankrow [name]:disabled").forEach(function (el) { el.disabled = false; });
    });
  }
})();
