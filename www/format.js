// Number formatting for the page, in the trade's plain terms.

export function bytes(n) {
  const units = ['bytes', 'KiB', 'MiB', 'GiB', 'TiB'];
  let value = Number(n);
  let unit = 0;
  while (value >= 1024 && unit < units.length - 1) {
    value /= 1024;
    unit += 1;
  }
  return unit === 0 ? `${value} bytes` : `${value.toFixed(value < 10 ? 2 : 1)} ${units[unit]}`;
}

/** Bytes in decimal units, as model sizes and memory budgets are quoted: 512 bytes, 3.20 kB,
 * 48.0 MB, 3.64 GB. */
export function decimalBytes(n) {
  const value = Number(n);
  const [unit, size] = [['GB', 1e9], ['MB', 1e6], ['kB', 1e3]].find(([, s]) => value >= s) ?? ['bytes', 1];
  return size === 1 ? `${value} bytes` : `${(value / size).toFixed(value / size < 100 ? 2 : 1)} ${unit}`;
}

export function sci(x, digits = 3) {
  if (x === null || x === undefined || Number.isNaN(x)) return '–';
  if (x === 0) return '0';
  const abs = Math.abs(x);
  return abs >= 1e-2 && abs < 1e4 ? x.toPrecision(digits) : x.toExponential(digits - 1);
}

/** A tick of a log axis (1, 2 or 5 times a power of ten, mostly): 0.05, 300, 1e-4, 2e+5. */
export function logTick(x) {
  if (x === null || x === undefined) return '';
  const abs = Math.abs(x);
  return abs >= 1e-2 && abs < 1e4 ? String(Number(x.toPrecision(2))) : x.toExponential(0);
}

export function count(n) {
  return Number(n).toLocaleString('en-US');
}

export function shape(dims) {
  return dims.length ? dims.join(' × ') : 'scalar';
}

export function percent(x) {
  return `${(100 * x).toPrecision(3)} %`;
}

/** "1 group", "2 groups". */
export function plural(n, noun) {
  return `${count(n)} ${noun}${Number(n) === 1 ? '' : 's'}`;
}
