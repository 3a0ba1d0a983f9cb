// The daily round (and the tank page's check form): live flags while typing, Enter moves on, and on the
// round nothing typed is lost: values are kept on this device as they are typed, a saved round goes into a
// small outbox on the device and is sent (exactly once: its submission key) when the network answers.
//
// Each reading input carries data-low / data-high (the tank's care target) and data-min / data-max
// (physical bounds). The server applies the same rules on save; this only shows them while typing.
(function () {
  "use strict";

  // ---- Live flags ------------------------------------------------------------------------------
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
      row.classList.toggle("has-flag", anyOut);
      var action = row.querySelector(".action-line");
      if (action) action.hidden = !anyOut && !action.querySelector("input").value.trim();
    }
  }

  function summarise(row) {
    // The observations' summary says whether anything differs from "looks normal".
    var details = row.querySelector("details.obs");
    if (!details) return;
    var changed = false;
    details.querySelectorAll("select[data-default]").forEach(function (s) { if (s.value !== s.dataset.default) changed = true; });
    details.querySelectorAll("input").forEach(function (i) {
      if (i.type === "checkbox" ? i.checked : (i.value.trim() !== "" && i.value.trim() !== "0")) changed = true;
    });
    details.querySelector("summary").textContent = "Observations: " + (changed ? "changed" : "normal");
  }

  document.addEventListener("input", function (event) {
    if (event.target.matches("input.reading")) evaluate(event.target);
    var row = event.target.closest(".tankrow");
    if (row) summarise(row);
  });
  document.addEventListener("change", function (event) {
    var row = event.target.closest(".tankrow");
    if (row) summarise(row);
  });
  document.querySelectorAll("input.reading").forEach(function (input) { if (input.value) evaluate(input); });

  var form = document.getElementById("round-form");
  if (!form) return;

  // The save bar says when the round is observed: now, or the time typed.
  var whenInput = form.querySelector("input[name='round-observed_at']");
  var whenSummary = form.querySelector(".savebar .when summary");
  if (whenInput && whenSummary) {
    var sayWhen = function () {
      whenSummary.textContent = whenInput.value ? "Observed " + whenInput.value.replace("T", " ") : "Observed now";
    };
    whenInput.addEventListener("change", sayWhen);
    sayWhen();
  }

  // ---- Enter moves to the next input; it never submits the round ---------------------------------
  function visibleInputs() {
    return Array.prototype.filter.call(form.querySelectorAll("input:not([type=hidden]), select"), function (el) {
      return !el.disabled && el.offsetParent !== null && !el.closest("details:not([open]) > :not(summary)");
    });
  }
  form.addEventListener("keydown", function (event) {
    if (event.key !== "Enter" || event.target.tagName === "BUTTON" || event.target.tagName === "TEXTAREA") return;
    event.preventDefault();
    var inputs = visibleInputs();
    var next = inputs[inputs.indexOf(event.target) + 1];
    if (next) next.focus();
  });

  // ---- Storage on this device --------------------------------------------------------------------
  var user = form.dataset.user || "";
  var draftKey = "vermilog.round.draft." + user + "." + location.pathname;
  var outboxKey = "vermilog.round.outbox." + user;
  var stateBox = document.getElementById("round-state");

  function load(key, fallback) {
    try { return JSON.parse(localStorage.getItem(key)) || fallback; } catch (e) { return fallback; }
  }
  function store(key, value) {
    try { localStorage.setItem(key, JSON.stringify(value)); return true; } catch (e) { return false; }
  }
  function rowFields() {
    return form.querySelectorAll(".tankrow input[name], .tankrow select[name]");
  }
  function collect() {
    // The filled inputs of the rows that hold anything besides the observations' defaults.
    var byRow = {};
    rowFields().forEach(function (el) {
      var row = el.closest(".tankrow").dataset.tank;
      var value = el.type === "checkbox" ? el.checked : el.value.trim();
      if (value === "" || value === false) return;
      byRow[row] = byRow[row] || { values: {}, filled: false };
      byRow[row].values[el.name] = value;
      if (!(el.dataset.default && value === el.dataset.default)) byRow[row].filled = true;
    });
    var values = {}, tanks = [];
    Object.keys(byRow).forEach(function (code) {
      if (!byRow[code].filled) return;
      tanks.push(code);
      Object.assign(values, byRow[code].values);
    });
    return { values: values, tanks: tanks };
  }
  function fill(values) {
    rowFields().forEach(function (el) {
      if (!(el.name in values)) return;
      if (el.type === "checkbox") el.checked = values[el.name] === true;
      else el.value = values[el.name];
      if (el.matches("input.reading")) evaluate(el);
    });
    form.querySelectorAll(".tankrow").forEach(summarise);
  }
  function clearRows() {
    rowFields().forEach(function (el) {
      if (el.type === "checkbox") el.checked = false;
      else el.value = el.dataset.default || "";
      if (el.matches("input.reading")) evaluate(el);
    });
    form.querySelectorAll(".tankrow").forEach(summarise);
  }

  // Keep what is typed as it is typed (a reload, a locked phone, a dropped network lose nothing).
  var saving = null;
  function writeDraft() {
    clearTimeout(saving);
    saving = null;
    var draft = collect();
    if (draft.tanks.length) store(draftKey, { values: draft.values, at: Date.now() });
    else localStorage.removeItem(draftKey);
  }
  function keepDraft() {
    clearTimeout(saving);
    saving = setTimeout(writeDraft, 150);
  }
  form.addEventListener("input", keepDraft);
  form.addEventListener("change", keepDraft);
  // The phone locks or the page goes away: write what is pending now.
  window.addEventListener("pagehide", function () { if (saving) writeDraft(); });
  document.addEventListener("visibilitychange", function () { if (document.hidden && saving) writeDraft(); });
  var isRefusal = document.querySelector(".error-jump") !== null;  // the server re-showed a refused round
  var draft = load(draftKey, null);
  if (draft && !isRefusal && collect().tanks.length === 0) {
    fill(draft.values);
    say("Restored what was typed on this device at " + when(draft.at) + ".");
  }

  // ---- The outbox: saved rounds until the server has them ------------------------------------------
  function newKey() {
    if (window.crypto && crypto.randomUUID) return crypto.randomUUID();
    var b = new Uint8Array(16);
    crypto.getRandomValues(b);
    b[6] = (b[6] & 0x0f) | 0x40; b[8] = (b[8] & 0x3f) | 0x80;
    var h = Array.prototype.map.call(b, function (x) { return (x + 256).toString(16).slice(1); }).join("");
    return h.slice(0, 8) + "-" + h.slice(8, 12) + "-" + h.slice(12, 16) + "-" + h.slice(16, 20) + "-" + h.slice(20);
  }
  function say(text) { if (stateBox) stateBox.textContent = text; }
  function csrfToken() {
    var field = form.querySelector("input[name=csrfmiddlewaretoken]");
    return field ? field.value : "";
  }
  // Times in the lab's time zone and its 24-hour format, whatever the device's own settings.
  function when(ms) {
    var options = { hour: "2-digit", minute: "2-digit", hourCycle: "h23" };
    try { return new Date(ms).toLocaleTimeString("en-GB", Object.assign({ timeZone: form.dataset.tz || "UTC" }, options)); }
    catch (e) { return new Date(ms).toLocaleTimeString("en-GB", options); }
  }

  function render() {
    var box = document.getElementById("round-outbox");
    var entries = load(outboxKey, []);
    if (!box) {
      box = document.createElement("section");
      box.id = "round-outbox";
      box.className = "outbox";
      box.setAttribute("aria-label", "Rounds saved on this device");
      form.parentNode.insertBefore(box, form);
    }
    box.hidden = entries.length === 0;
    box.innerHTML = "";
    entries.forEach(function (e) {
      var p = document.createElement("p");
      p.className = "outbox-entry state-" + e.state;
      var what = "Round of " + when(e.created) + " (" + e.tanks.length + " tank" + (e.tanks.length === 1 ? "" : "s") + ", " + e.path + "): ";
      var text = {
        kept: "kept on this device, not sent yet; it is sent when the network answers.",
        sending: "sending…",
        sent: "sent at " + when(e.sentAt || e.created) + ". " + (e.message || ""),
        refused: "refused by the server, nothing of it was saved: " + (e.message || ""),
        signin: "not sent: sign in again, then it is sent."
      }[e.state] || e.state;
      p.textContent = what + text;
      if (e.state === "refused") {
        var open = document.createElement("a");
        open.href = e.path + "#restore-" + e.id;
        open.textContent = " Open it to correct";
        p.appendChild(open);
      }
      box.appendChild(p);
    });
    var waiting = entries.filter(function (e) { return e.state === "kept" || e.state === "signin"; }).length;
    if (waiting) say(waiting + " round" + (waiting === 1 ? "" : "s") + " kept on this device, not sent yet.");
  }

  function update(id, changes) {
    var entries = load(outboxKey, []);
    entries.forEach(function (e) { if (e.id === id) Object.assign(e, changes); });
    // Keep the sent ones a day, so the technician can see they went.
    var day = Date.now() - 864e5;
    store(outboxKey, entries.filter(function (e) { return e.state !== "sent" || (e.sentAt || 0) > day; }));
    render();
  }

  function body(entry) {
    var data = new URLSearchParams();
    data.set("csrfmiddlewaretoken", csrfToken());
    data.set("submission_key", entry.id);
    data.set("tanks", entry.tanks.join(","));
    data.set("round-observed_at", entry.observedAt || "");
    data.set("round-kept_at", new Date(entry.created).toISOString());
    data.set(form.dataset.rowsField, JSON.stringify(entry.values));
    return data;
  }

  function messagesOf(html) {
    var doc = new DOMParser().parseFromString(html, "text/html");
    var found = doc.querySelectorAll(".messages li, .errorbox");
    return Array.prototype.map.call(found, function (el) { return el.textContent.trim(); }).join(" ");
  }

  var flushing = false;
  function flush() {
    if (flushing || !navigator.onLine) return Promise.resolve();
    var entry = load(outboxKey, []).filter(function (e) { return e.state === "kept" || e.state === "signin"; })[0];
    if (!entry) return Promise.resolve();
    flushing = true;
    update(entry.id, { state: "sending" });
    return fetch(entry.path, { method: "POST", body: body(entry), credentials: "same-origin" })
      .then(function (response) {
        return response.text().then(function (html) {
          var landed = new URL(response.url, location.href).pathname;
          if (response.redirected && /\/(accounts\/)?login\//.test(landed)) update(entry.id, { state: "signin" });
          else if (response.ok && response.redirected) update(entry.id, { state: "sent", sentAt: Date.now(), message: messagesOf(html) });
          else if (response.status === 400 || response.status === 409) update(entry.id, { state: "refused", message: messagesOf(html) || html.slice(0, 300) });
          else update(entry.id, { state: response.status === 403 ? "signin" : "kept" });
        });
      })
      .catch(function () { update(entry.id, { state: "kept" }); })
      .then(function () {
        flushing = false;
        var more = load(outboxKey, []).some(function (e) { return e.state === "kept"; });
        if (more && navigator.onLine) return flush();
      });
  }

  // Saving. Online, the round is posted as a plain form (the server answers with its page: saved, or refused
  // with each error beside its field), but first it is put in the outbox under a key made here, so that if the
  // network fails on the way the round is not lost (the service worker shows the kept page instead of an error)
  // and is sent again later under the same key: the server records a key once (colonies/idempotency.py).
  // Offline, it goes straight to the outbox.
  form.addEventListener("submit", function (event) {
    var typed = collect();
    if (!typed.tanks.length) return;  // nothing to keep: the server says so
    var observed = form.querySelector("input[name='round-observed_at']");
    var entry = { id: newKey(), path: location.pathname, created: Date.now(), values: typed.values,
                  tanks: typed.tanks, observedAt: observed ? observed.value : "",
                  state: navigator.onLine ? "posting" : "kept" };
    var entries = load(outboxKey, []);
    entries.push(entry);
    if (!store(outboxKey, entries)) {
      if (!navigator.onLine) { event.preventDefault(); say("This device's storage is full: the round was not kept."); }
      return;
    }
    localStorage.removeItem(draftKey);
    form.querySelector("input[name=submission_key]").value = entry.id;
    if (!navigator.onLine) {
      event.preventDefault();
      clearRows();
      if (observed) observed.value = "";
      render();
      return;
    }
    // One hidden JSON field instead of every input: a round of any size stays under Django's field limit.
    var field = form.querySelector("input[name='" + form.dataset.rowsField + "']");
    if (!field) {
      field = document.createElement("input");
      field.type = "hidden";
      field.name = form.dataset.rowsField;
      form.appendChild(field);
    }
    field.value = JSON.stringify(typed.values);
    rowFields().forEach(function (el) { el.disabled = true; });
  });
  // Back-forward cache: a page restored after submit must be editable again.
  window.addEventListener("pageshow", function () { rowFields().forEach(function (el) { el.disabled = false; }); });

  function restore(entry) {
    // A refused round goes back into the form (if it is this page's), so it can be corrected and saved again.
    if (entry.path !== location.pathname) return;
    fill(entry.values);
    store(outboxKey, load(outboxKey, []).filter(function (e) { return e.id !== entry.id; }));
    render();
    say("Refused, nothing was saved: " + (entry.message || "") + " Correct the values and save again.");
    var first = form.querySelector("input.is-impossible");
    if (first) first.focus();
  }
  var asked = /^#restore-(.+)$/.exec(location.hash);
  if (asked) {
    var wanted = load(outboxKey, []).filter(function (e) { return e.id === asked[1]; })[0];
    if (wanted) restore(wanted);
  }

  // What the server says it has: rounds posted from this page land here (saved: their key is among the saved
  // ones; refused: this page shows them again with their errors). A post or send cut off on the way is kept
  // and sent again: if it had reached the server, the server answers "already saved" for its key.
  var saved = (form.dataset.saved || "").split(",");
  var refused = form.dataset.refused;
  store(outboxKey, load(outboxKey, []).filter(function (e) {
    return !(e.id === refused || (e.state === "posting" && saved.indexOf(e.id) >= 0));
  }).map(function (e) {
    if (saved.indexOf(e.id) >= 0 && e.state !== "sent") return Object.assign(e, { state: "sent", sentAt: Date.now() });
    if (e.state === "posting" || e.state === "sending") return Object.assign(e, { state: "kept" });
    return e;
  }));
  render();
  window.addEventListener("online", flush);
  setInterval(flush, 30000);
  flush();
  if (/[?&]sent=/.test(location.search)) history.replaceState(null, "", location.pathname);

  // The service worker keeps a copy of this page and its files for a reload without network.
  if ("serviceWorker" in navigator && form.dataset.sw) {
    navigator.serviceWorker.register(form.dataset.sw, { scope: form.dataset.sw.replace(/sw\.js$/, "") }).catch(function () {});
  }
})();
