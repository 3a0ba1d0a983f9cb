// Date and time inputs show the browser's locale (12/05/2026, 2:30 PM on one phone, 05.12.2026 on
// another). Beside each one this writes what was picked the lab's way ("05 Dec 2026 14:30") and the
// lab's time zone, which is what the server will store. The text is built from the input's own
// value (ISO, local wall time), so no browser time-zone or locale conversion is involved.
(function () {
  "use strict";
  var MONTHS = ["Jan", "Feb", "Mar", "Apr", "May", "Jun", "Jul", "Aug", "Sep", "Oct", "Nov", "Dec"];
  var zone = document.documentElement.dataset.labZone || "";

  function two(n) { return (n < 10 ? "0" : "") + n; }

  // Returns the lab's text for an ISO value (YYYY-MM-DD or YYYY-MM-DDTHH:MM), or "" when empty.
  function labText(value) {
    var m = /^(\d{4})-(\d{2})-(\d{2})(?:T(\d{2}):(\d{2}))?/.exec(value || "");
    if (!m) return "";
    var text = two(+m[3]) + " " + MONTHS[+m[2] - 1] + " " + m[1];
    return m[4] === undefined ? text : text + " " + m[4] + ":" + m[5];
  }

  function attach(input) {
    var out = document.createElement("span");
    out.className = "lab-date";
    out.id = (input.id || input.name) + "-lab";
    // Read as the input's description (aria-describedby), not as part of its name when a <label>
    // wraps both: hidden from the name computation, still readable through the reference.
    out.setAttribute("aria-hidden", "true");
    input.insertAdjacentElement("afterend", out);
    var described = input.getAttribute("aria-describedby");
    input.setAttribute("aria-describedby", described ? described + " " + out.id : out.id);
    function show() {
      var text = labText(input.value);
      var timed = input.type === "datetime-local";
      out.textContent = text ? "= " + text + (timed && zone ? " (" + zone + ")" : "")
                             : (timed && zone ? "Lab time: " + zone : "");
    }
    input.addEventListener("input", show);
    input.addEventListener("change", show);
    show();
  }

  document.querySelectorAll('input[type="date"], input[type="datetime-local"]').forEach(attach);
})();
