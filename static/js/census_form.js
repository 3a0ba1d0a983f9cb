// Census form: show only the chosen method's fieldset (direct count, aliquot counts or wet mass).
// Without this script every fieldset is shown and the form works the same; the server validates as before.
(function () {
  "use strict";

  document.querySelectorAll("select[data-census-method]").forEach(function (select) {
    var sets = select.form.querySelectorAll("fieldset.census-method");
    function show() {
      sets.forEach(function (set) {
        // A fieldset holding an error stays visible, whatever the method, so the error can be read.
        set.hidden = set.dataset.method !== select.value && !set.querySelector(".errorlist");
      });
    }
    select.addEventListener("change", show);
    show();
  });
})();
