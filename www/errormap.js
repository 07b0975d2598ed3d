// The error map: one cell per group (rows × groups of a row), coloured by that group's error.
// Drawn on a canvas at the display's resolution: when several groups share a pixel the pixel
// shows the largest error among them, so a hot group never disappears when zoomed out.

import { DIVERGING, TABLE } from './colors.js';

const MIN_SPAN = 4;

/** A colour table of [r, g, b] as opaque RGBA pixels, in the byte order of an ImageData's
 * buffer seen as 32-bit words. */
function packed(table) {
  const bytes = new Uint8ClampedArray(table.length * 4);
  table.forEach(([r, g, b], i) => bytes.set([r, g, b, 255], i * 4));
  return new Uint32Array(bytes.buffer);
}

const SEQUENTIAL_PIXELS = packed(TABLE);
const DIVERGING_PIXELS = packed(DIVERGING);

export class ErrorMap {
  constructor(canvas, { onHover = () => {}, onSelect = () => {} } = {}) {
    this.canvas = canvas;
    this.ctx = canvas.getContext('2d');
    this.onHover = onHover;
    this.onSelect = onSelect;
    this.data = null;
    this.selectedColumn = null;
    this.selectedGroup = null;
    this.listen();
    new ResizeObserver(() => this.draw()).observe(canvas);
  }

  /**
   * @param {{rows:number, perRow:number, cols:number, groupSize:number|null,
   *          values:Float32Array, log:boolean}} data
   */
  setData(data, { keepView = false } = {}) {
    const sameGrid = this.data && this.data.rows === data.rows && this.data.perRow === data.perRow;
    this.data = data;
    let max = 0;
    let minPositive = Infinity;
    const { values } = data;
    for (let i = 0; i < values.length; i++) {
      const a = Math.abs(values[i]);
      if (a > max) max = a;
      if (a > 0 && a < minPositive) minPositive = a;
    }
    // A shared range (for maps shown side by side) overrides the map's own.
    this.max = data.range ? data.range.max : max;
    // An all-zero map (an exact reconstruction) has no positive value to start a log scale at.
    this.floor = data.range ? data.range.floor : data.log && max > 0 ? Math.max(minPositive, max * 1e-6) : 0;
    this.colours = data.diverging ? DIVERGING_PIXELS : SEQUENTIAL_PIXELS;
    if (!(keepView && sameGrid)) this.reset(false);
    // A tooltip shown for the old figures would stay until the pointer moved.
    this.onHover(null);
    this.draw();
  }

  /** The value range the colours span, for the legend. */
  range() {
    return { lo: this.floor, hi: this.max, log: this.data?.log };
  }

  reset(redraw = true) {
    if (!this.data) return;
    this.view = { x0: 0, x1: this.data.perRow, y0: 0, y1: this.data.rows };
    if (redraw) this.draw();
  }

  // A selection is drawn over the last image of the cells, which is not computed again for it:
  // a recipe change moves the selection twice after the new cells are drawn.
  setSelectedColumn(col) {
    this.selectedColumn = col;
    this.draw({ cellsChanged: false });
  }

  setSelectedGroup(index) {
    this.selectedGroup = index;
    this.draw({ cellsChanged: false });
  }

  /** Colour position in [0, 1] of one value (diverging maps put 0 at ½). */
  position(v) {
    if (this.data.diverging) return this.max > 0 ? Math.min(1, Math.max(0, 0.5 + v / (2 * this.max))) : 0.5;
    if (!(v > 0) || this.max <= 0) return 0;
    if (!this.data.log) return v / this.max;
    const lo = Math.log10(this.floor);
    const hi = Math.log10(this.max);
    return hi > lo ? Math.max(0, (Math.log10(v) - lo) / (hi - lo)) : 1;
  }

  /** For each pixel along one axis, the range of cells it covers. */
  static spans(pixels, from, to, cells) {
    const start = new Int32Array(pixels);
    const end = new Int32Array(pixels);
    const step = (to - from) / pixels;
    for (let p = 0; p < pixels; p++) {
      const a = Math.min(cells - 1, Math.max(0, Math.floor(from + p * step)));
      const b = Math.min(cells, Math.max(a + 1, Math.ceil(from + (p + 1) * step)));
      start[p] = a;
      end[p] = b;
    }
    return { start, end };
  }

  draw({ cellsChanged = true } = {}) {
    const { canvas, ctx, data } = this;
    const dpr = window.devicePixelRatio || 1;
    const width = Math.max(1, Math.round(canvas.clientWidth * dpr));
    const height = Math.max(1, Math.round(canvas.clientHeight * dpr));
    if (canvas.width !== width || canvas.height !== height) {
      canvas.width = width;
      canvas.height = height;
    }
    if (!data) {
      ctx.clearRect(0, 0, width, height);
      return;
    }
    if (cellsChanged || !this.cells || this.cells.width !== width || this.cells.height !== height) this.cells = this.drawCells(width, height);
    ctx.putImageData(this.cells, 0, 0);
    this.drawSelection(width, height, dpr);
  }

  /** The image of the cells in view, `width` × `height` pixels. */
  drawCells(width, height) {
    const { data, colours } = this;
    const { x0, x1, y0, y1 } = this.view;
    const xs = ErrorMap.spans(width, x0, x1, data.perRow);
    const ys = ErrorMap.spans(height, y0, y1, data.rows);
    const image = this.ctx.createImageData(width, height);
    const pixels = new Uint32Array(image.data.buffer);
    const first = xs.start[0];
    const last = xs.end[width - 1];
    // Per pixel row: the value of each cell column in view (the largest magnitude among the rows
    // the pixel row covers, keeping its sign for diverging maps) and its colour. A pixel that
    // covers several cell columns takes the colour of the largest among them, so a hot group
    // never disappears when zoomed out; the colour scale is computed once per cell column, not
    // once per pixel.
    const colMax = new Float32Array(data.perRow);
    const colColour = new Uint32Array(data.perRow);
    for (let py = 0; py < height; py++) {
      const offset = py * width;
      if (py > 0 && ys.start[py] === ys.start[py - 1] && ys.end[py] === ys.end[py - 1]) {
        pixels.copyWithin(offset, offset - width, offset);
        continue;
      }
      colMax.fill(0, first, last);
      for (let r = ys.start[py]; r < ys.end[py]; r++) {
        const base = r * data.perRow;
        for (let c = first; c < last; c++) {
          const v = data.values[base + c];
          if (Math.abs(v) > Math.abs(colMax[c])) colMax[c] = v;
        }
      }
      for (let c = first; c < last; c++) colColour[c] = colours[Math.round(this.position(colMax[c]) * 255)];
      for (let px = 0; px < width; px++) {
        let best = xs.start[px];
        for (let c = best + 1; c < xs.end[px]; c++) if (Math.abs(colMax[c]) > Math.abs(colMax[best])) best = c;
        pixels[offset + px] = colColour[best];
      }
    }
    return image;
  }

  drawSelection(width, height, dpr) {
    const { ctx, data } = this;
    const { x0, x1, y0, y1 } = this.view;
    const toX = (cell) => ((cell - x0) / (x1 - x0)) * width;
    const toY = (cell) => ((cell - y0) / (y1 - y0)) * height;
    const accent = getComputedStyle(this.canvas).getPropertyValue('--accent').trim() || '#e4572e';
    if (this.selectedColumn !== null) {
      const colsPerCell = data.groupSize || data.cols / data.perRow;
      const x = toX((this.selectedColumn + 0.5) / colsPerCell);
      const w = Math.max(2 * dpr, width / (x1 - x0) / colsPerCell);
      ctx.fillStyle = accent;
      ctx.globalAlpha = 0.85;
      ctx.fillRect(x - w / 2, 0, w, height);
      ctx.globalAlpha = 1;
    }
    if (this.selectedGroup !== null && this.selectedGroup < data.rows * data.perRow) {
      const r = Math.floor(this.selectedGroup / data.perRow);
      const k = this.selectedGroup % data.perRow;
      ctx.strokeStyle = accent;
      ctx.lineWidth = 2 * dpr;
      const x = toX(k);
      const y = toY(r);
      ctx.strokeRect(x - dpr, y - dpr, Math.max(toX(k + 1) - x, 3 * dpr) + 2 * dpr, Math.max(toY(r + 1) - y, 3 * dpr) + 2 * dpr);
    }
  }

  /** The group under a point in CSS pixels, or null. */
  groupAt(mx, my) {
    if (!this.data) return null;
    const { x0, x1, y0, y1 } = this.view;
    const k = Math.floor(x0 + (mx / this.canvas.clientWidth) * (x1 - x0));
    const r = Math.floor(y0 + (my / this.canvas.clientHeight) * (y1 - y0));
    if (k < 0 || r < 0 || k >= this.data.perRow || r >= this.data.rows) return null;
    return { row: r, k, index: r * this.data.perRow + k };
  }

  zoom(factor, fx = 0.5, fy = 0.5) {
    if (!this.data) return;
    const v = this.view;
    const zoomAxis = (a, b, f, total) => {
      const span = Math.min(total, Math.max(Math.min(MIN_SPAN, total), (b - a) * factor));
      const centre = a + f * (b - a);
      let lo = centre - f * span;
      lo = Math.max(0, Math.min(total - span, lo));
      return [lo, lo + span];
    };
    [v.x0, v.x1] = zoomAxis(v.x0, v.x1, fx, this.data.perRow);
    [v.y0, v.y1] = zoomAxis(v.y0, v.y1, fy, this.data.rows);
    this.draw();
  }

  pan(dxFraction, dyFraction) {
    if (!this.data) return;
    const v = this.view;
    const shift = (a, b, d, total) => {
      const span = b - a;
      const lo = Math.max(0, Math.min(total - span, a + d * span));
      return [lo, lo + span];
    };
    [v.x0, v.x1] = shift(v.x0, v.x1, dxFraction, this.data.perRow);
    [v.y0, v.y1] = shift(v.y0, v.y1, dyFraction, this.data.rows);
    this.draw();
  }

  listen() {
    const c = this.canvas;
    let drag = null;
    c.addEventListener('pointermove', (e) => {
      if (drag) {
        const dx = (drag.x - e.offsetX) / c.clientWidth;
        const dy = (drag.y - e.offsetY) / c.clientHeight;
        if (Math.abs(dx) + Math.abs(dy) > 0.002) drag.moved = true;
        drag.x = e.offsetX;
        drag.y = e.offsetY;
        this.pan(dx, dy);
      }
      this.onHover(this.groupAt(e.offsetX, e.offsetY), e);
    });
    c.addEventListener('pointerleave', () => this.onHover(null));
    c.addEventListener('pointerdown', (e) => {
      drag = { x: e.offsetX, y: e.offsetY, moved: false };
      c.setPointerCapture(e.pointerId);
    });
    c.addEventListener('pointerup', (e) => {
      const moved = drag?.moved;
      drag = null;
      if (!moved) {
        const hit = this.groupAt(e.offsetX, e.offsetY);
        if (hit) this.onSelect(hit.index);
      }
    });
    c.addEventListener('wheel', (e) => {
      e.preventDefault();
      this.zoom(e.deltaY > 0 ? 1.25 : 0.8, e.offsetX / c.clientWidth, e.offsetY / c.clientHeight);
    }, { passive: false });
    c.addEventListener('keydown', (e) => {
      const actions = {
        '+': () => this.zoom(0.8), '=': () => this.zoom(0.8), '-': () => this.zoom(1.25), '0': () => this.reset(),
        ArrowLeft: () => this.pan(-0.1, 0), ArrowRight: () => this.pan(0.1, 0),
        ArrowUp: () => this.pan(0, -0.1), ArrowDown: () => this.pan(0, 0.1),
      };
      if (actions[e.key]) {
        e.preventDefault();
        actions[e.key]();
      }
    });
  }
}
