{% load static %}// Vermilog's round service worker (served at /round/sw.js; scope /round/).
// It does one thing: keep the last copy of each round page and of the files it uses, so a round page
// reloaded without network still opens and shows the rounds kept on the device (static/js/round.js keeps
// what is typed and sends saved rounds when the network is back). Pages come from the network whenever
// it answers; the copy is only used when it does not. A write (POST) always goes to the server; only when
// the network fails does the kept page answer instead.
"use strict";
const CACHE = "vermilog-round-{{ version }}";
const FILES = ["{% static 'css/vermilog.css' %}", "{% static 'css/round.css' %}", "{% static 'js/round.js' %}"];

self.addEventListener("install", (event) => {
  event.waitUntil(caches.open(CACHE).then((cache) => cache.addAll(FILES)).then(() => self.skipWaiting()));
});

self.addEventListener("activate", (event) => {
  event.waitUntil(
    caches.keys()
      .then((keys) => Promise.all(keys.filter((k) => k.startsWith("vermilog-round-") && k !== CACHE).map((k) => caches.delete(k))))
      .then(() => self.clients.claim())
  );
});

self.addEventListener("fetch", (event) => {
  const request = event.request;
  if (new URL(request.url).origin !== self.location.origin) return;
  if (request.method === "POST") {
    // A round posted as the network drops: show the kept round page instead of the browser's error page.
    // The page script already holds the round in its outbox and sends it when the network is back.
    if (request.mode === "navigate") {
      event.respondWith(fetch(request).catch(() => caches.match(request.url).then((hit) => hit || Response.error())));
    }
    return;
  }
  if (request.method !== "GET") return;
  event.respondWith(
    fetch(request).then((response) => {
      // A redirect (e.g. to the sign-in page) or an error page is not a round page to keep.
      if (response.ok && !response.redirected && response.type === "basic") {
        const copy = response.clone();
        caches.open(CACHE).then((cache) => cache.put(request, copy));
      }
      return response;
    }).catch(() => caches.match(request).then((hit) => hit || Response.error()))
  );
});
