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
    for (let e = Math.floor(Math.log10(lo)); e <= Math.ceil(Math.log10(hi)); e++) out.push(10 ** e);
    return out.filter((t) => t >= lo && t <= hi);
  }
  const step = (hi - lo) / count || 1;
  return Array.from({ length: count + 1 }, (_, i) => lo + i * step);
}

function label(v) {
  return Math.abs(v) >= 1e4 || (Math.abs(v) < 1e-2 && v !== 0) ? v.toExponential(1) : Number(v.toPrecision(3)).toString();
}

function frame(title, body) {
  return `<?xml version="1.0" encoding="UTF-8"?>\n<svg xmlns="http://www.w3.org/2000/svg" width="${W}" height="${H}" viewBox="0 0 ${W} ${H}" font-family="system-ui, sans-serif" font-size="12">\n<rect width="${W}" height="${H}" fill="#ffffff"/>\n<text x="${W / 2}" y="18" text-anchor="middle" font-size="14">${escape(title)}</text>\n${body}</svg>\n`;
}

/** Lines (or points) over a shared x axis. series: [{label, values, colour, points}]. */
export function seriesSvg(title, x, series, { xLabel, yLabel, logY = false }) {
  const ys = series.flatMap((s) => Array.from(s.values).filter((v) => v !== null && Number.isFinite(v) && (!logY || v > 0)));
  const xs = Array.from(x);
  if (!ys.length || !xs.length) return frame(title, '');
  let [ylo, yhi] = [Math.min(...ys), Math.max(...ys)];
  if (ylo === yhi) [ylo, yhi] = logY ? [ylo / 2, yhi * 2] : [ylo - 1, yhi + 1];
  const [xlo, xhi] = [Math.min(...xs), Math.max(...xs) === Math.min(...xs) ? Math.min(...xs) + 1 : Math.max(...xs)];
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
    if (s.points) {
      body += pts.map(([a, b]) => `<circle cx="${px(a).toFixed(1)}" cy="${py(b).toFixed(1)}" r="3.5" fill="${c}"/>`).join('') + '\n';
    } else {
      body += `<polyline fill="none" stroke="${c}" stroke-width="1.25" points="${pts.map(([a, b]) => `${px(a).toFixed(1)},${py(b).toFixed(1)}`).join(' ')}"/>\n`;
    }
    body += `<rect x="${M.left + 10 + k * 130}" y="${M.top - 4}" width="10" height="10" fill="${c}"/><text x="${M.left + 24 + k * 130}" y="${M.top + 5}">${escape(s.label)}</text>\n`;
  });
  return frame(title, body);
}

/** A picture (a canvas) in an SVG frame with a title. */
export function pictureSvg(title, canvas) {
  const url = canvas.toDataURL('image/png');
  return frame(title, `<image x="${M.left}" y="${M.top}" width="${W - M.left - M.right}" height="${H - M.top - M.bottom}" preserveAspectRatio="none" href="${url}"/>\n`);
}
