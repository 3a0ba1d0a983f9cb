// Trial form: show only the settings of the chosen stimulus type (with its caution) and the
// derived values as they are typed. Without JavaScript every group stays visible.
(function () {
  "use strict";
  var kind = document.querySelector("select[data-stimulus-kind]");
  if (!kind) return;
  var groups = document.querySelectorAll(".stim-group");

  function number(name) {
    var input = document.querySelector('[name="' + name + '"]');
    var value = input ? parseFloat(input.value) : NaN;
    return isFinite(value) ? value : null;
  }

  function fmt(x) { return Number(x.toPrecision(4)).toString(); }

  function showGroups() {
    groups.forEach(function (group) {
      var kinds = group.getAttribute("data-kinds").split(" ");
      group.hidden = kinds.indexOf(kind.value) === -1;
    });
  }

  function derive() {
    var dose = document.querySelector('[data-derived="dose"]');
    var field = document.querySelector('[data-derived="field"]');
    var irr = number("irradiance_mw_cm2"), dur = number("duration_s");
    if (dose) dose.textContent = irr !== null && dur !== null ? "Dose = " + fmt(irr) + " mW/cm² × " + fmt(dur) + " s = " + fmt(irr * dur) + " mJ/cm²" : "";
    var volts = number("voltage_v"), gap = number("electrode_gap_cm");
    var width = number("pulse_width_ms"), count = number("pulse_count"), freq = number("pulse_frequency_hz");
    var parts = [];
    if (volts !== null && gap) parts.push("Field = " + fmt(volts) + " V ÷ " + fmt(gap) + " cm = " + fmt(volts / gap) + " V/cm");
    if (width !== null && count) parts.push("on-time " + fmt(width * count / 1000) + " s");
    if (freq && count) parts.push("train " + fmt(count / freq) + " s");
    if (field) field.textContent = parts.join("; ");
  }

  kind.addEventListener("change", showGroups);
  document.querySelector(".trial-form").addEventListener("input", derive);
  showGroups();
  derive();
})();
