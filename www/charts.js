// Charts drawn with uPlot (vendored from the npm registry). Colours come from the page's CSS
// variables so light and dark themes both read well.
/* global uPlot */
import { logTick } from './format.js';

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

function height(el) {
  return Number(el.dataset.height || 220);
}

/** A vertical line at `x` over the plot, or only its lowest `reach` (a fraction) of it. */
function drawVertical(u, x, colour, width = 2, reach = 1) {
  const pos = u.valToPos(x, 'x', true);
  if (pos < u.bbox.left || pos > u.bbox.left + u.bbox.width) return;
  const { ctx } = u;
  const bottom = u.bbox.top + u.bbox.height;
  ctx.save();
  ctx.strokeStyle = colour;
  ctx.lineWidth = width * devicePixelRatio;
  ctx.beginPath();
  ctx.moveTo(pos, bottom - u.bbox.height * reach);
  ctx.lineTo(pos, bottom);
  ctx.stroke();
  ctx.restore();
}

/** Counts on an axis: 950, 12k, 3M (a full 3,000,000 ran into the axis title). */
const compactCount = new Intl.NumberFormat('en', { notation: 'compact', maximumFractionDigits: 1 });

/**
 * Lines over a shared x axis, optional marked points, an optional vertical marker, and a click
 * that reports the x index under the cursor.
 *
 * series: [{label, values, colour: CSS variable, scale?: 'y' | 'right', points?: true, width?: px,
 * dash?: [dash, gap] in px}]. Lines that can lie on one another differ in width or dashes, and
 * the legend shows each line's own stroke.
 */
export class SeriesChart {
  constructor(el, { xLabel, yLabel, rightLabel = null, logY = false, onSelect = null }) {
    Object.assign(this, { el, xLabel, yLabel, rightLabel, logY, onSelect });
    this.chart = null;
    this.marker = null;
    this.shape = '';
    new ResizeObserver(() => this.chart?.setSize({ width: Math.max(200, el.clientWidth), height: height(el) })).observe(el);
  }

  setData(x, series) {
    this.last = { x, series };
    const data = [x, ...series.map((s) => s.values)];
    const shape = `${x.length}:${this.yLabel}:${this.logY}:${series.map((s) => s.label).join('|')}`;
    if (this.chart && shape === this.shape) {
      this.chart.setData(data);
      return;
    }
    this.shape = shape;
    this.chart?.destroy();
    const distr = this.logY ? 3 : 1;
    const scales = { x: { time: false }, y: { distr }, right: { distr } };
    const uSeries = [{ label: this.xLabel }, ...series.map((s) => {
      const colour = themed(s.colour, '#3b6ea5');
      const base = { label: s.label, stroke: colour, width: s.points ? 0 : s.width ?? 1.25, dash: s.dash, scale: s.scale || 'y', spanGaps: Boolean(s.spanGaps), class: s.points ? 'point-series' : 'line-series' };
      return s.points ? { ...base, fill: colour, paths: () => null, points: { show: true, size: 7, stroke: colour, fill: colour } } : base;
    })];
    // uPlot's own labels keep three decimals, so a log axis of small errors read 0, 0, 0.
    const values = this.logY ? { values: (u, splits) => splits.map(logTick) } : {};
    const axes = [axis({ label: this.xLabel }), axis({ label: this.yLabel, size: 64, ...values })];
    if (this.rightLabel) axes.push(axis({ scale: 'right', side: 1, label: this.rightLabel, size: 64, grid: { show: false }, ...values }));
    this.chart = new uPlot({
      width: Math.max(200, this.el.clientWidth),
      height: height(this.el),
      // A line's marker is a stretch of the line (style.css), drawn with its width and dashes.
      legend: { show: true, live: true, markers: { width: (u, i) => u.series[i].width || 2, dash: (u, i) => (u.series[i].dash?.length ? 'dashed' : 'solid') } },
      cursor: { drag: { x: true, y: false }, points: { size: 6 } },
      scales,
      series: uSeries,
      axes,
      hooks: { draw: [(u) => { if (this.marker !== null) drawVertical(u, this.marker, themed('--accent', '#e4572e')); }] },
    }, data, this.el);
    if (this.onSelect) {
      this.chart.over.addEventListener('click', () => {
        const idx = this.chart.cursor.idx;
        if (idx !== null && idx !== undefined) this.onSelect(idx);
      });
    }
  }

  mark(x) {
    this.marker = x;
    this.chart?.redraw(false, false);
  }
}

/**
 * More grid levels than this (an 8-bit grid's 256, FP8's 253) would paint the histogram over,
 * a line every two or three pixels: they are drawn as a comb along its bottom instead.
 */
export const COMB_ABOVE_LEVELS = 64;

/** How far up the plot a group's grid levels are drawn: all the way, or a comb (above). */
export function levelReach(levels) {
  return levels > COMB_ABOVE_LEVELS ? 0.08 : 1;
}

/** Histogram of one group's values with that group's grid levels drawn over it. */
export class GroupHistogram {
  constructor(el) {
    this.el = el;
    this.chart = null;
    this.grid = [];
    new ResizeObserver(() => this.chart?.setSize({ width: Math.max(200, el.clientWidth), height: height(el) })).observe(el);
  }

  setData({ histogram, grid }) {
    this.last = { histogram, grid };
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
    this.chart?.destroy();
    this.chart = new uPlot({
      width: Math.max(200, this.el.clientWidth),
      height: height(this.el),
      legend: { show: false },
      cursor: { show: true, points: { show: false } },
      scales: { x: { time: false, range: () => this.range }, y: { range: (u, min, max) => [0, Math.max(1, max) * 1.08] } },
      series: [
        {},
        { label: 'count', fill: themed('--series1-soft', '#3b6ea555'), stroke: themed('--series1', '#3b6ea5'), width: 1,
          paths: uPlot.paths.bars({ size: [0.95, Infinity], align: 0 }) },
      ],
      axes: [axis({ label: 'weight value' }), axis({ label: 'count', size: 56, values: (u, splits) => splits.map((v) => compactCount.format(v)) })],
      hooks: {
        draw: [(u) => {
          const reach = levelReach(this.grid.length);
          this.grid.forEach((level) => drawVertical(u, level, themed('--accent', '#e4572e'), 0.75, reach));
        }],
      },
    }, [x, Float64Array.from(counts)], this.el);
  }
}
