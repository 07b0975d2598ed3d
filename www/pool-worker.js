// A pool worker of the threaded core: it instantiates the compute worker's wasm module on the
// same shared memory, says it is ready, then runs the core's thread loop for as long as the pool
// lives (the core spreads the row blocks of every analysis over these workers). If the core
// fails here (out of memory, say), the page hears of it on the pool's broadcast channel, since
// the compute worker itself is blocked waiting for this thread.
/* global wasm_bindgen, importScripts */
'use strict';

importScripts('pkg-threads/bitloupe.js');

self.onmessage = ({ data: { module, memory, channel } }) => {
  try {
    wasm_bindgen.initSync({ module, memory });
    postMessage('ready');
    wasm_bindgen.poolThread();
  } catch (err) {
    let panic = null;
    try {
      panic = wasm_bindgen.takePanicMessage();
    } catch {
      // The module never started: the error itself says why.
    }
    new BroadcastChannel(channel).postMessage(panic || String((err && err.message) || err));
    throw err;
  }
};
