// The main thread's side of the compute worker: promises for requests, progress callbacks, and
// cancel. The core runs synchronously inside the worker, so cancel ends the worker and starts a
// fresh one; the bridge then replays the last successful open and analysis there, so that the
// tensor and results on screen stay usable. With the threaded core the worker runs a pool of
// workers of its own; one that fails speaks on a broadcast channel (the compute worker is blocked
// waiting for it), and the bridge restarts everything the same way.

export class Cancelled extends Error {
  constructor() {
    super('cancelled');
    this.name = 'Cancelled';
  }
}

/** Restarts in a row whose worker never got ready, after which the bridge gives up. */
const MAX_FAILED_STARTS = 3;

/**
 * How an exhausted wasm memory shows: Rust's allocation-failure messages (the core reports its
 * own aborts in those words, see `takePanicMessage`), or the engine's.
 */
const OUT_OF_MEMORY = /AllocError|memory allocation of \d+ bytes failed|capacity overflow|Out of memory|out of memory|Array buffer allocation failed/;

/**
 * What the user reads of a trap inside the core: out of memory, or `failed` with the panic or
 * engine message `reason`.
 */
function trapText(reason, failed, withSample) {
  const exhausted = reason.match(OUT_OF_MEMORY);
  const fewer = withSample ? ', fewer calibration tokens' : '';
  return exhausted
    ? `the core ran out of memory (${exhausted[0]}): this run needs more than the 4 GiB of WebAssembly memory a browser gives one page; try a smaller tensor${fewer} or the command-line tool`
    : `${failed} (${reason})`;
}

export class CoreBridge {
  /**
   * @param {() => Worker} makeWorker
   * @param {WebAssembly.Module | ArrayBuffer} wasm
   * @param {number} threads pool workers of the threaded core (0: the single-threaded core)
   */
  constructor(makeWorker, wasm, threads = 0) {
    this.makeWorker = makeWorker;
    this.wasm = wasm;
    this.threads = threads;
    this.failedStarts = 0;
    this.nextId = 1;
    this.pending = new Map();
    this.remembered = { open: null, calib: null, analyze: null };
    this.onRestart = () => {};
    this.ready = Promise.resolve();
  }

  /** Start the worker; resolves with what the core's init returns (its defaults). */
  async start() {
    this.worker = this.makeWorker();
    this.worker.onmessage = (event) => this.receive(event.data);
    this.worker.onerror = (event) => {
      event.preventDefault();
      this.restart(new Error('the compute worker stopped unexpectedly; the last tensor was reloaded'));
    };
    this.pool?.close();
    const channel = `bitloupe-pool-${Date.now()}-${Math.random()}`;
    if (this.threads) {
      this.pool = new BroadcastChannel(channel);
      this.pool.onmessage = (event) => this.restart(new Error(`${trapText(event.data, 'a compute pool worker failed', this.holdsSample())}; the last tensor was reloaded`));
    }
    try {
      const ready = await this.send('init', { wasm: this.wasm, threads: this.threads, channel });
      this.failedStarts = 0;
      return ready;
    } catch (err) {
      this.failedStarts += 1;
      throw err;
    }
  }

  receive(message) {
    const entry = this.pending.get(message.id);
    if (!entry) return;
    if (message.progress) {
      entry.onProgress?.(message.progress[0], message.progress[1], message.items);
      return;
    }
    this.pending.delete(message.id);
    if (message.ok) {
      this.lastComputeMs = message.computeMs;
      entry.resolve(message.result);
      return;
    }
    entry.reject(new Error(message.fatal ? trapText(message.error, 'the computation failed inside the core', this.holdsSample()) : message.error));
    if (message.fatal) this.restart(new Error('the compute worker was restarted and the last tensor reloaded'));
    else if (message.restart) this.restart(new Error(`${message.error}; the last tensor was reloaded`));
  }

  send(type, payload = {}, { onProgress, transfer = [] } = {}) {
    const id = this.nextId++;
    return new Promise((resolve, reject) => {
      this.pending.set(id, { resolve, reject, onProgress });
      this.worker.postMessage({ id, type, ...payload }, transfer);
    });
  }

  /**
   * A request. `remember: 'open' | 'calib' | 'analyze'` marks one that sets the worker's state,
   * to be replayed (in that order) after a cancel.
   */
  async request(type, payload = {}, { onProgress, remember } = {}) {
    await this.ready;
    const result = await this.send(type, payload, { onProgress });
    if (remember) {
      this.remembered[remember] = { type, payload };
      if (remember !== 'analyze') this.remembered.analyze = null;
    }
    return result;
  }

  /** Whether the worker holds an activation sample (the demo's, or a file read as one). */
  holdsSample() {
    const calib = this.remembered.calib;
    return calib !== null && (calib.payload.kind ?? 'sample') === 'sample';
  }

  /** Stop replaying a remembered state (after it was cleared in the worker). */
  forget(kind) {
    this.remembered[kind] = null;
  }

  /** Stop whatever runs now; its promise rejects with Cancelled. */
  cancel() {
    return this.restart(new Cancelled());
  }

  restart(reason) {
    this.worker.terminate();
    this.pool?.close();
    const waiting = [...this.pending.values()];
    this.pending.clear();
    waiting.forEach((entry) => entry.reject(reason));
    // New requests wait until the fresh worker holds the same state again.
    this.ready = (async () => {
      // A worker that cannot even start (its script missing, say) is not restarted forever.
      if (this.failedStarts >= MAX_FAILED_STARTS) throw new Error('the compute worker could not start; reload the page');
      await this.start();
      for (const kind of ['open', 'calib', 'analyze']) {
        const step = this.remembered[kind];
        if (step) await this.send(step.type, step.payload).catch(() => {});
      }
      this.onRestart(reason);
    })();
    return this.ready;
  }
}
