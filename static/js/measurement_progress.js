// Trial page: follow image measurements that are queued or measuring. Each <span data-progress-url>
// holds a <progress> bar; its JSON says frames done and total. When none is in progress any more the
// page reloads once to show the result (the figure, the proposal).
(function () {
  "use strict";
  var boxes = Array.prototype.slice.call(document.querySelectorAll("[data-progress-url]"));
  if (!boxes.length) return;
  var INTERVAL_MS = 1000;

  function poll() {
    Promise.all(boxes.map(function (box) {
      return fetch(box.getAttribute("data-progress-url"), { headers: { Accept: "application/json" }, credentials: "same-origin" })
        .then(function (r) { return r.ok ? r.json() : null; })
        .then(function (p) {
          if (!p) return true;
          var bar = box.querySelector("progress");
          var text = box.querySelector("[data-progress-text]");
          if (bar) { bar.max = p.total; bar.value = p.done; bar.textContent = p.percent + " %"; }
          if (text) text.textContent = p.shown_status + " " + p.done + " / " + p.total;
          return p.in_progress;
        })
        .catch(function () { return true; });
    })).then(function (running) {
      if (running.some(Boolean)) {
        window.setTimeout(poll, INTERVAL_MS);
      } else {
        window.location.reload();
      }
    });
  }
  window.setTimeout(poll, INTERVAL_MS);
})();
