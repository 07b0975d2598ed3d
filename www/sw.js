// Offline support: pre-cache every file of the build on install, then answer from the cache
// first. `precache.js` (written by `cargo xtask build`) lists the files and names the cache, so
// a new build replaces the old cache.
/* global PRECACHE_VERSION, PRECACHE_FILES */
importScripts('precache.js');

self.addEventListener('install', (event) => {
  event.waitUntil(caches.open(PRECACHE_VERSION).then((cache) => cache.addAll(PRECACHE_FILES)).then(() => self.skipWaiting()));
});

self.addEventListener('activate', (event) => {
  event.waitUntil(
    caches.keys()
      .then((keys) => Promise.all(keys.filter((k) => k !== PRECACHE_VERSION).map((k) => caches.delete(k))))
      .then(() => self.clients.claim()),
  );
});

self.addEventListener('fetch', (event) => {
  const { request } = event;
  if (request.method !== 'GET' || new URL(request.url).origin !== self.location.origin) return;
  event.respondWith(
    caches.open(PRECACHE_VERSION).then(async (cache) => {
      const hit = await cache.match(request, { ignoreSearch: true });
      return hit || fetch(request);
    }),
  );
});
