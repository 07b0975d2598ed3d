// Charts drawn with uPlot (vendored from the npm registry): the column profile and the group
// histogram. Colours come from the page's CSS variables so light and dark themes both read well.
/* global uPlot */

function themed(name, fallback) {
  return getComputedStyle(document.documentElement).getPropertyValue(name).trim() || fallback;
}

function axis(extra = {}) {
  return {
    stroke: themed('--muted', '#667'),
    grid: { stroke: themed('--grid', '#8882'), width: 1 },
    ticks: { stroke: themed('--grid', '#8882'), width: 1 },
    font: '12px system-ui, sans-serif',
    ...extra,
  };
}

function sized(el, make) {
  const chart = make(Math.max(200, el.clientWidth), Number(el.dataset.height || 220));
  new ResizeObserver(() => chart.setSize({ width: Math.max(200, el.clientWidth), height: Number(el.dataset.height || 220) })).observe(el);
  return chart;
}

/** Per-input-column max |w| and error RMS, outlier columns marked; a click selects a column. */
export class ColumnProfile {
  constructor(el, { onSelect }) {
    this.el = el;
    this.onSelect = onSelect;
    this.chart = null;
    this.selected = null;
  }

  setData({ maxAbs, errRms, outlier }) {
    const n = maxAbs.length;
    const x = Float64Array.from({ length: n }, (_, i) => i);
    const marks = Array.from(maxAbs, (v, i) => (outlier[i] ? v : null));
    const data = [x, maxAbs, errRms, marks];
    if (this.chart && this.chart.data[0].length === n) {
      this.chart.setData(data);
      return;
    }
    this.chart?.destroy();
    const accent = themed('--accent', '#e4572e');
    this.chart = sized(this.el, (width, height) => new uPlot({
      width,
      height,
      legend: { show: true, live: true },
      cursor: { drag: { x: true, y: false }, points: { size: 6 } },
      scales: { x: { time: false }, y: { distr: 3 }, err: { distr: 3 } },
      series: [
        { label: 'input column' },
        { label: 'max |w|', stroke: themed('--series1', '#3b6ea5'), width: 1 },
        { label: 'error RMS', stroke: themed('--series2', '#21918c'), width: 1, scale: 'err' },
        { label: 'outlier', stroke: accent, fill: accent, width: 0, paths: () => null, points: { show: true, size: 7, stroke: accent, fill: accent } },
      ],
      axes: [axis({ label: 'input column' }), axis({ label: 'max |w| (log)', size: 64 }), axis({ scale: 'err', side: 1, label: 'error RMS (log)', size: 64, grid: { show: false } })],
      hooks: { draw: [(u) => this.drawSelection(u)] },
    }, data, this.el));
    this.chart.over.addEventListener('click', () => {
      const idx = this.chart.cursor.idx;
      if (idx !== null && idx !== undefined) this.onSelect(idx);
    });
  }

  select(col) {
    this.selected = col;
    this.chart?.redraw(false, false);
  }

  drawSelection(u) {
    if (this.selected === null) return;
    const x = u.valToPos(this.selected, 'x', true);
    const { ctx } = u;
    ctx.save();
    ctx.strokeStyle = themed('--accent', '#e4572e');
    ctx.lineWidth = 2 * devicePixelRatio;
    ctx.beginPath();
    ctx.moveTo(x, u.bbox.top);
    ctx.lineTo(x, u.bbox.top + u.bbox.height);
    ctx.stroke();
    ctx.restore();
  }
}

/** Histogram of one group's values with that group's grid levels drawn over it. */
export class GroupHistogram {
  constructor(el) {
    this.el = el;
    this.chart = null;
    this.grid = [];
  }

  setData({ histogram, grid }) {
    const { lo, hi, counts } = histogram;
    const bins = counts.length;
    const width = (hi - lo) / bins || 1;
    const x = Float64Array.from({ length: bins }, (_, i) => lo + (i + 0.5) * width);
    this.grid = grid;
    // The x range spans the values and the grid, so clipped levels show too.
    const gridLo = grid.length ? Math.min(grid[0], lo) : lo;
    const gridHi = grid.length ? Math.max(grid[grid.length - 1], hi) : hi;
    const pad = (gridHi - gridLo) * 0.03 || 1;
    this.range = [gridLo - pad, gridHi + pad];
    const data = [x, Float64Array.from(counts)];
    this.chart?.destroy();
    this.chart = sized(this.el, (w, h) => new uPlot({
      width: w,
      height: h,
      legend: { show: false },
      cursor: { show: true, points: { show: false } },
      scales: { x: { time: false, range: () => this.range }, y: { range: (u, min, max) => [0, Math.max(1, max) * 1.08] } },
      series: [
        {},
        { label: 'count', fill: themed('--series1-soft', '#3b6ea555'), stroke: themed('--series1', '#3b6ea5'), width: 1,
          paths: uPlot.paths.bars({ size: [0.95, Infinity], align: 0 }) },
      ],
      axes: [axis({ label: 'weight value' }), axis({ label: 'count', size: 56 })],
      hooks: { draw: [(u) => this.drawGrid(u)] },
    }, data, this.el));
  }

  drawGrid(u) {
    const { ctx } = u;
    ctx.save();
    ctx.strokeStyle = themed('--accent', '#e4572e');
    ctx.globalAlpha = 0.75;
    ctx.lineWidth = Math.max(1, devicePixelRatio);
    for (const level of this.grid) {
      const x = u.valToPos(level, 'x', true);
      if (x < u.bbox.left || x > u.bbox.left + u.bbox.width) continue;
      ctx.beginPath();
      ctx.moveTo(x, u.bbox.top);
      ctx.lineTo(x, u.bbox.top + u.bbox.height);
      ctx.stroke();
    }
    ctx.restore();
  }
}
