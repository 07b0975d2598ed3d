// Charts as standalone SVG files: lines and points as vectors with their axes, and the error maps
// as their pictures inside an SVG frame with a title and colour scale (a heat map of many thousand
// cells is a picture); that frame is also the maps' PNG file.

const W = 720;
const H = 360;
const M = { left: 70, right: 20, top: 30, bottom: 50 };

function escape(text) {
  return String(text).replace(/[&<>"]/g, (c) => ({ '&': '&amp;', '<': '&lt;', '>': '&gt;', '"': '&quot;' })[c]);
}

function colour(variable) {
  return getComputedStyle(document.documentElement).getPropertyValue(variable).trim() || '#3b6ea5';
}

function ticks(lo, hi, count, log) {
  if (log) {
    // Powers of ten where the range spans decades; within a decade or two, their 2 and 5 times too.
    for (const multiples of [[1], [1, 2, 5]]) {
      const out = [];
      for (let e = Math.floor(Math.log10(lo)); e <= Math.ceil(Math.log10(hi)); e++) out.push(...multiples.map((m) => Number(`${m}e${e}`)));
      const inside = out.filter((t) => t >= lo && t <= hi);
      if (inside.length >= 3) return inside;
    }
  }
  // About `count` steps of 1, 2 or 5 times a power of ten, on multiples of the step.
  const rough = (hi - lo) / count || 1;
  const power = 10 ** Math.floor(Math.log10(rough));
  const step = [1, 2, 5, 10].map((m) => m * power).reduce((a, b) => (Math.abs(Math.log(b / rough)) < Math.abs(Math.log(a / rough)) ? b : a));
  const out = [];
  for (let k = Math.ceil(lo / step); k * step <= hi + step * 1e-9; k++) out.push(Number((k * step).toPrecision(12)));
  return out;
}

function label(v) {
  return Math.abs(v) >= 1e4 || (Math.abs(v) < 1e-2 && v !== 0) ? v.toExponential(1) : Number(v.toPrecision(3)).toString();
}

function frame(title, body) {
  return `<?xml version="1.0" encoding="UTF-8"?>\n<svg xmlns="http://www.w3.org/2000/svg" width="${W}" height="${H}" viewBox="0 0 ${W} ${H}" font-family="system-ui, sans-serif" font-size="12">\n<rect width="${W}" height="${H}" fill="#ffffff"/>\n<text x="${W / 2}" y="18" text-anchor="middle" font-size="14">${escape(title)}</text>\n${body}</svg>\n`;
}

/** A series' sample for the legend: a stretch of its line (with its width and dashes), a dot or a
 * block. */
function swatch(s, x, y, c) {
  if (s.bars) return `<rect x="${x}" y="${y - 5}" width="10" height="10" fill="${c}"/>`;
  if (s.points) return `<circle cx="${x + 5}" cy="${y}" r="3.5" fill="${c}"/>`;
  return `<line x1="${x - 6}" x2="${x + 16}" y1="${y}" y2="${y}" stroke="${c}"${stroke(s)}/>`;
}

/** A line series' width and dashes as SVG attributes. */
function stroke(s) {
  return ` stroke-width="${s.width ?? 1.25}"${s.dash ? ` stroke-dasharray="${s.dash.join(' ')}"` : ''}`;
}

/**
 * Lines, points or bars over a shared x axis, with optional vertical lines at `marks` (a group's
 * grid levels, say) rising over `markReach` of the plot's height. series: [{label, values,
 * colour, points, bars, width, dash, scale}]; bars rise from 0. With `rightLabel`, the series of
 * scale 'right' have their own y axis on the right, as on the page.
 */
export function seriesSvg(title, x, series, { xLabel, yLabel, rightLabel = null, logY = false, marks = [], markColour = '--accent', markReach = 1 }) {
  const plotted = (v) => v !== null && Number.isFinite(v) && (!logY || v > 0);
  const onRight = (s) => rightLabel !== null && s.scale === 'right';
  const sides = [{ label: yLabel, series: series.filter((s) => !onRight(s)) }];
  if (rightLabel !== null) sides.push({ label: rightLabel, series: series.filter(onRight), right: true });
  const xs = Array.from(x);
  for (const side of sides) {
    const ys = side.series.flatMap((s) => Array.from(s.values).filter(plotted));
    if (!ys.length) continue;
    let [lo, hi] = [Math.min(...ys), Math.max(...ys)];
    if (side.series.some((s) => s.bars)) lo = Math.min(lo, 0);
    if (lo === hi) [lo, hi] = logY ? [lo / 2, hi * 2] : [lo - 1, hi + 1];
    Object.assign(side, { lo, hi });
  }
  if (!xs.length || !sides.some((side) => side.lo !== undefined)) return frame(title, '');
  const right = rightLabel === null ? M.right : M.left;
  const xr = [...xs, ...marks];
  const [xlo, xhi] = [Math.min(...xr), Math.max(...xr) === Math.min(...xr) ? Math.min(...xr) + 1 : Math.max(...xr)];
  const px = (v) => M.left + ((v - xlo) / (xhi - xlo)) * (W - M.left - right);
  const tf = (v) => (logY ? Math.log10(v) : v);
  const bottom = H - M.bottom;
  const middle = (M.top + bottom) / 2;
  let body = `<g stroke="#999" stroke-width="1"><line x1="${M.left}" y1="${bottom}" x2="${W - right}" y2="${bottom}"/><line x1="${M.left}" y1="${M.top}" x2="${M.left}" y2="${bottom}"/>${rightLabel === null ? '' : `<line x1="${W - right}" y1="${M.top}" x2="${W - right}" y2="${bottom}"/>`}</g>\n`;
  for (const t of ticks(xlo, xhi, 6, false)) body += `<text x="${px(t)}" y="${bottom + 16}" text-anchor="middle">${label(t)}</text>\n`;
  body += `<text x="${(M.left + W - right) / 2}" y="${H - 12}" text-anchor="middle">${escape(xLabel)}</text>\n`;
  for (const side of sides) {
    if (side.lo === undefined) continue;
    side.py = (v) => bottom - ((tf(v) - tf(side.lo)) / (tf(side.hi) - tf(side.lo))) * (bottom - M.top);
    body += `<g class="y-axis ${side.right ? 'right' : 'left'}">\n`;
    // The grid lines follow the left axis only; the right axis has ticks, as on the page.
    for (const t of ticks(side.lo, side.hi, 5, logY)) {
      body += side.right
        ? `<text x="${W - right + 6}" y="${side.py(t) + 4}">${label(t)}</text><line x1="${W - right}" x2="${W - right + 4}" y1="${side.py(t)}" y2="${side.py(t)}" stroke="#999"/>\n`
        : `<text x="${M.left - 6}" y="${side.py(t) + 4}" text-anchor="end">${label(t)}</text><line x1="${M.left}" x2="${W - right}" y1="${side.py(t)}" y2="${side.py(t)}" stroke="#0001"/>\n`;
    }
    body += `<text transform="translate(${side.right ? `${W - 16} ${middle}) rotate(90)` : `16 ${middle}) rotate(-90)`}" text-anchor="middle">${escape(side.label)}</text>\n</g>\n`;
  }
  // The series in the page's drawing order (the later on top), and the legend in the same order,
  // each entry as wide as its text.
  let legendX = M.left + 16;
  for (const s of series) {
    const c = colour(s.colour);
    const { py, lo } = sides.find((side) => side.series.includes(s));
    const pts = py ? xs.map((xv, i) => [xv, s.values[i]]).filter(([, v]) => plotted(v)) : [];
    if (s.bars) {
      const half = ((W - M.left - right) / Math.max(1, xs.length) / 2) * 0.95;
      body += pts.map(([a, b]) => `<rect x="${(px(a) - half).toFixed(1)}" y="${py(b).toFixed(1)}" width="${(2 * half).toFixed(1)}" height="${(py(lo) - py(b)).toFixed(1)}" fill="${c}"/>`).join('') + '\n';
    } else if (s.points) {
      body += pts.map(([a, b]) => `<circle cx="${px(a).toFixed(1)}" cy="${py(b).toFixed(1)}" r="3.5" fill="${c}"/>`).join('') + '\n';
    } else {
      body += `<polyline fill="none" stroke="${c}"${stroke(s)} points="${pts.map(([a, b]) => `${px(a).toFixed(1)},${py(b).toFixed(1)}`).join(' ')}"/>\n`;
    }
    body += `${swatch(s, legendX, M.top + 1, c)}<text x="${legendX + 22}" y="${M.top + 5}">${escape(s.label)}</text>\n`;
    legendX += 44 + 6.5 * s.label.length;
  }
  const mc = colour(markColour);
  const markTop = bottom - (bottom - M.top) * markReach;
  body += marks.map((m) => `<line x1="${px(m).toFixed(1)}" x2="${px(m).toFixed(1)}" y1="${markTop}" y2="${bottom}" stroke="${mc}" stroke-width="0.75"/>`).join('') + '\n';
  return frame(title, body);
}

/**
 * A picture (a canvas) in an SVG frame with a title, and under it, when given, its colour scale:
 * legend = { lo, hi, label, colours } (the scale's colours low to high, the end values as text).
 */
export function pictureSvg(title, canvas, legend = null) {
  const url = canvas.toDataURL('image/png');
  let body = `<image x="${M.left}" y="${M.top}" width="${W - M.left - M.right}" height="${H - M.top - M.bottom}" preserveAspectRatio="none" style="image-rendering: pixelated" href="${url}"/>\n`;
  if (legend) {
    const [x, y, w] = [M.left + 60, H - M.bottom + 14, 200];
    const stops = legend.colours.map((c, i) => `<stop offset="${i / (legend.colours.length - 1)}" stop-color="${c}"/>`).join('');
    body += `<defs><linearGradient id="scale">${stops}</linearGradient></defs>\n`;
    body += `<text x="${x - 6}" y="${y + 10}" text-anchor="end">${escape(legend.lo)}</text><rect x="${x}" y="${y}" width="${w}" height="12" fill="url(#scale)"/><text x="${x + w + 6}" y="${y + 10}">${escape(legend.hi)}</text>\n`;
    // Under the scale from the left margin: a difference map's label says what each colour means.
    body += `<text x="${M.left}" y="${y + 28}">${escape(legend.label)}</text>\n`;
  }
  return frame(title, body);
}

/**
 * An SVG file (one of the above) drawn as a PNG at `scale` times its size. The drawing reads the
 * file from a data: address, which is no request at all (a blob: one is a request to the page's
 * own memory, and the page makes none after it has loaded).
 */
export async function pngOf(svg, scale = 2) {
  const image = new Image();
  image.src = `data:image/svg+xml;charset=utf-8,${encodeURIComponent(svg)}`;
  await image.decode();
  const canvas = document.createElement('canvas');
  canvas.width = W * scale;
  canvas.height = H * scale;
  canvas.getContext('2d').drawImage(image, 0, 0, canvas.width, canvas.height);
  const blob = await new Promise((resolve) => canvas.toBlob(resolve, 'image/png'));
  if (!blob) throw new Error('the browser could not draw the picture');
  return blob;
}
