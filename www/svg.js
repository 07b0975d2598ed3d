// Charts as standalone SVG files: lines and points as vectors with their axes, and the error map
// as its picture inside an SVG frame with a title (a heat map of many thousand cells is a picture).

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
    const out = [];
    for (let e = Math.floor(Math.log10(lo)); e <= Math.ceil(Math.log10(hi)); e++) out.push(Number(`1e${e}`));
    return out.filter((t) => t >= lo && t <= hi);
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

/**
 * Lines, points or bars over a shared x axis, with optional vertical lines at `marks` (a group's
 * grid levels, say) rising over `markReach` of the plot's height. series: [{label, values,
 * colour, points, bars}]; bars rise from 0.
 */
export function seriesSvg(title, x, series, { xLabel, yLabel, logY = false, marks = [], markColour = '--accent', markReach = 1 }) {
  const ys = series.flatMap((s) => Array.from(s.values).filter((v) => v !== null && Number.isFinite(v) && (!logY || v > 0)));
  const xs = Array.from(x);
  if (!ys.length || !xs.length) return frame(title, '');
  let [ylo, yhi] = [Math.min(...ys), Math.max(...ys)];
  if (series.some((s) => s.bars)) ylo = Math.min(ylo, 0);
  if (ylo === yhi) [ylo, yhi] = logY ? [ylo / 2, yhi * 2] : [ylo - 1, yhi + 1];
  const xr = [...xs, ...marks];
  const [xlo, xhi] = [Math.min(...xr), Math.max(...xr) === Math.min(...xr) ? Math.min(...xr) + 1 : Math.max(...xr)];
  const px = (v) => M.left + ((v - xlo) / (xhi - xlo)) * (W - M.left - M.right);
  const tf = (v) => (logY ? Math.log10(v) : v);
  const py = (v) => H - M.bottom - ((tf(v) - tf(ylo)) / (tf(yhi) - tf(ylo))) * (H - M.top - M.bottom);
  let body = `<g stroke="#999" stroke-width="1"><line x1="${M.left}" y1="${H - M.bottom}" x2="${W - M.right}" y2="${H - M.bottom}"/><line x1="${M.left}" y1="${M.top}" x2="${M.left}" y2="${H - M.bottom}"/></g>\n`;
  for (const t of ticks(xlo, xhi, 6, false)) body += `<text x="${px(t)}" y="${H - M.bottom + 16}" text-anchor="middle">${label(t)}</text>\n`;
  for (const t of ticks(ylo, yhi, 5, logY)) body += `<text x="${M.left - 6}" y="${py(t) + 4}" text-anchor="end">${label(t)}</text><line x1="${M.left}" x2="${W - M.right}" y1="${py(t)}" y2="${py(t)}" stroke="#0001"/>\n`;
  body += `<text x="${(M.left + W - M.right) / 2}" y="${H - 12}" text-anchor="middle">${escape(xLabel)}</text>\n`;
  body += `<text transform="translate(16 ${(M.top + H - M.bottom) / 2}) rotate(-90)" text-anchor="middle">${escape(yLabel)}</text>\n`;
  series.forEach((s, k) => {
    const c = colour(s.colour);
    const pts = xs.map((xv, i) => [xv, s.values[i]]).filter(([, v]) => v !== null && Number.isFinite(v) && (!logY || v > 0));
    if (s.bars) {
      const half = ((W - M.left - M.right) / Math.max(1, xs.length) / 2) * 0.95;
      body += pts.map(([a, b]) => `<rect x="${(px(a) - half).toFixed(1)}" y="${py(b).toFixed(1)}" width="${(2 * half).toFixed(1)}" height="${(py(ylo) - py(b)).toFixed(1)}" fill="${c}"/>`).join('') + '\n';
    } else if (s.points) {
      body += pts.map(([a, b]) => `<circle cx="${px(a).toFixed(1)}" cy="${py(b).toFixed(1)}" r="3.5" fill="${c}"/>`).join('') + '\n';
    } else {
      body += `<polyline fill="none" stroke="${c}" stroke-width="1.25" points="${pts.map(([a, b]) => `${px(a).toFixed(1)},${py(b).toFixed(1)}`).join(' ')}"/>\n`;
    }
    body += `<rect x="${M.left + 10 + k * 130}" y="${M.top - 4}" width="10" height="10" fill="${c}"/><text x="${M.left + 24 + k * 130}" y="${M.top + 5}">${escape(s.label)}</text>\n`;
  });
  const mc = colour(markColour);
  const markTop = H - M.bottom - (H - M.top - M.bottom) * markReach;
  body += marks.map((m) => `<line x1="${px(m).toFixed(1)}" x2="${px(m).toFixed(1)}" y1="${markTop}" y2="${H - M.bottom}" stroke="${mc}" stroke-width="0.75"/>`).join('') + '\n';
  return frame(title, body);
}

/**
 * A picture (a canvas) in an SVG frame with a title, and under it, when given, its colour scale:
 * legend = { lo, hi, label, colours } (the scale's colours low to high, the end values as text).
 */
export function pictureSvg(title, canvas, legend = null) {
  const url = canvas.toDataURL('image/png');
  let body = `<image x="${M.left}" y="${M.top}" width="${W - M.left - M.right}" height="${H - M.top - M.bottom}" preserveAspectRatio="none" href="${url}"/>\n`;
  if (legend) {
    const [x, y, w] = [M.left + 60, H - M.bottom + 14, 200];
    const stops = legend.colours.map((c, i) => `<stop offset="${i / (legend.colours.length - 1)}" stop-color="${c}"/>`).join('');
    body += `<defs><linearGradient id="scale">${stops}</linearGradient></defs>\n`;
    body += `<text x="${x - 6}" y="${y + 10}" text-anchor="end">${escape(legend.lo)}</text><rect x="${x}" y="${y}" width="${w}" height="12" fill="url(#scale)"/><text x="${x + w + 6}" y="${y + 10}">${escape(legend.hi)}</text>\n`;
    body += `<text x="${x}" y="${y + 28}">${escape(legend.label)}</text>\n`;
  }
  return frame(title, body);
}
