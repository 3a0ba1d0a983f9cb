// Long forms of one row per tank (the daily round, the many-tanks screen) post their rows as ONE hidden
// JSON field, decoded by colonies/round_post.py. Django refuses a request with more than
// DATA_UPLOAD_MAX_NUMBER_FIELDS fields (1,000), which a few dozen rows already exceed; this keeps any
// number of rows to a handful of fields. Without this script the plain fields are sent, as before.
//
// A form opts in with data-rows-field="<the JSON field's name>"; its rows are the elements matching
// data-rows (default ".tankrow"). Inputs outside the rows (the observed time, the keys) are sent as usual.
(function () {
  "use strict";

  document.querySelectorAll("form[data-rows-field]").forEach(function (form) {
    var rowSelector = form.dataset.rows || ".tankrow";
    var inputs = function () {
      return form.querySelectorAll(rowSelector + " input[name], " + rowSelector + " select[name], " +
                                   rowSelector + " textarea[name]");
    };
    form.addEventListener("submit", function () {
      var rows = {};
      inputs().forEach(function (el) {
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
      inputs().forEach(function (el) { el.disabled = false; });
    });
  });
})();
