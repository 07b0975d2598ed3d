// A perceptually uniform sequential colour scale (viridis, whose published colour table is in the
// public domain), sampled at 11 stops and interpolated linearly in sRGB.

const STOPS = [
  [68, 1, 84], [72, 36, 117], [65, 68, 135], [53, 95, 141], [42, 120, 142], [33, 145, 140],
  [34, 168, 132], [68, 191, 112], [122, 209, 81], [189, 223, 38], [253, 231, 37],
];

/** A 256-entry lookup table of [r, g, b]. */
export const TABLE = Array.from({ length: 256 }, (_, i) => {
  const t = (i / 255) * (STOPS.length - 1);
  const k = Math.min(Math.floor(t), STOPS.length - 2);
  const f = t - k;
  return STOPS[k].map((c, j) => Math.round(c + f * (STOPS[k + 1][j] - c)));
});

/** The scale's stops as CSS colours, low to high. */
export const STOP_COLOURS = STOPS.map((c) => `rgb(${c.join(', ')})`);

/** The ends and middle of the diverging scale for differences: blue (lower), a light grey (no
 * change), red (higher). */
const DIVERGING_STOPS = [[49, 104, 176], [236, 236, 236], [200, 60, 45]];

/** The diverging scale as a 256-entry lookup table of [r, g, b], for the A/B difference map. */
export const DIVERGING = Array.from({ length: 256 }, (_, i) => {
  const t = i / 255;
  const [low, mid, high] = DIVERGING_STOPS;
  const end = t < 0.5 ? low : high;
  const f = Math.abs(t - 0.5) * 2;
  return mid.map((c, j) => Math.round(c + f * (end[j] - c)));
});

/** The diverging scale's stops as CSS colours, low to high. */
export const DIVERGING_COLOURS = DIVERGING_STOPS.map((c) => `rgb(${c.join(', ')})`);
