// The "why it matched" view: heat maps over both images (the exact split of the score over
// feature-map cells), linked region pairs, and the feature detectors that carried the score.
import { el, formatPercent, formatScore, whereIs } from "./common.js";

// Our own ramp, from "none of the score" to "the largest cell": deep teal, sea green, saffron, cream.
const RAMP = [
  [0.0, [24, 70, 92, 0.0]],
  [0.25, [30, 110, 122, 0.0]],
  [0.45, [46, 140, 132, 0.38]],
  [0.7, [236, 178, 62, 0.68]],
  [1.0, [255, 244, 214, 0.9]],
];
export const RAMP_CSS_STOPS = RAMP;

// Pair colours: distinct in hue and lightness; numbers are drawn on them too, so colour is never the only cue.
export const PAIR_COLOURS = ["#d1452b", "#2b6cb0", "#2f8a47", "#8c4bb8", "#b7791f", "#0f7c86"];

function ramp(t) {
  t = Math.max(0, Math.min(1, t));
  for (let i = 1; i < RAMP.length; i += 1) {
    const [t1, c1] = RAMP[i];
    const [t0, c0] = RAMP[i - 1];
    if (t <= t1) {
      const f = (t - t0) / (t1 - t0 || 1);
      return c0.map((v, k) => v + (c1[k] - v) * f);
    }
  }
  return RAMP[RAMP.length - 1][1];
}

function mapStats(map) {
  let max = 0;
  let sum = 0;
  let best = [0, 0];
  map.forEach((row, r) =>
    row.forEach((v, c) => {
      sum += v;
      if (v > max) {
        max = v;
        best = [r, c];
      }
    }),
  );
  return { max, sum, best, rows: map.length, cols: map.length ? map[0].length : 0 };
}

/** Map a box given in the coordinates of `area` (a sub-box of the image) to whole-image fractions. */
function within(area, box) {
  const w = area[2] - area[0];
  const h = area[3] - area[1];
  return [area[0] + box[0] * w, area[1] + box[1] * h, area[0] + box[2] * w, area[1] + box[3] * h];
}

/** One image with a canvas on top: heat map cells, region box, numbered pair boxes. */
class Overlay {
  constructor(img, canvas, { map, area, pairs, score, readout, who }) {
    this.img = img;
    this.canvas = canvas;
    this.map = map;
    this.area = area || [0, 0, 1, 1];
    this.pairs = pairs; // [{box (whole-image fractions), colour, n}]
    this.score = score;
    this.readout = readout;
    this.who = who;
    this.stats = mapStats(map);
    this.showHeat = true;
    this.showPairs = true;
    this.active = null;
    this.observer = new ResizeObserver(() => this.draw());
    this.observer.observe(img);
    img.addEventListener("load", () => this.draw());
    canvas.addEventListener("mousemove", (e) => this.hover(e));
    canvas.addEventListener("mouseleave", () => this.readoutText(""));
    this.draw();
  }

  readoutText(text) {
    if (this.readout) this.readout.textContent = text || "\u00a0";
  }

  hover(event) {
    const rect = this.canvas.getBoundingClientRect();
    const fx = (event.clientX - rect.left) / rect.width;
    const fy = (event.clientY - rect.top) / rect.height;
    const [a0, b0, a1, b1] = this.area;
    if (fx < a0 || fx >= a1 || fy < b0 || fy >= b1 || !this.stats.rows) {
      this.readoutText(this.area[2] - this.area[0] < 1 ? "outside the region that was compared" : "");
      return;
    }
    const r = Math.min(this.stats.rows - 1, Math.floor(((fy - b0) / (b1 - b0)) * this.stats.rows));
    const c = Math.min(this.stats.cols - 1, Math.floor(((fx - a0) / (a1 - a0)) * this.stats.cols));
    const v = this.map[r][c];
    const share = this.score ? v / this.score : 0;
    this.readoutText(`this cell: ${v.toFixed(5)}, ${formatPercent(share)} of the score`);
  }

  draw() {
    const { img, canvas } = this;
    const w = img.clientWidth;
    const h = img.clientHeight;
    if (!w || !h) return;
    const dpr = window.devicePixelRatio || 1;
    canvas.width = Math.round(w * dpr);
    canvas.height = Math.round(h * dpr);
    const ctx = canvas.getContext("2d");
    ctx.clearRect(0, 0, canvas.width, canvas.height);
    const W = canvas.width;
    const H = canvas.height;
    const [a0, b0, a1, b1] = this.area;
    const partial = a1 - a0 < 1 || b1 - b0 < 1;

    if (partial) {
      // Only this region of the query was compared: dim the rest, outline the region.
      ctx.fillStyle = "rgba(245, 243, 238, 0.72)";
      ctx.fillRect(0, 0, W, H);
      ctx.clearRect(a0 * W, b0 * H, (a1 - a0) * W, (b1 - b0) * H);
    }
    if (this.showHeat && this.stats.rows) {
      ctx.fillStyle = "rgba(14, 20, 28, 0.38)";
      ctx.fillRect(a0 * W, b0 * H, (a1 - a0) * W, (b1 - b0) * H);
      const { rows, cols, max } = this.stats;
      const cw = ((a1 - a0) * W) / cols;
      const ch = ((b1 - b0) * H) / rows;
      for (let r = 0; r < rows; r += 1) {
        for (let c = 0; c < cols; c += 1) {
          const t = max > 0 ? Math.max(0, this.map[r][c]) / max : 0;
          const [R, G, B, A] = ramp(t);
          if (A <= 0.01) continue;
          ctx.fillStyle = `rgba(${R | 0}, ${G | 0}, ${B | 0}, ${A.toFixed(3)})`;
          // Snap to whole device pixels so neighbouring cells meet without seams.
          const x0 = Math.round(a0 * W + c * cw);
          const y0 = Math.round(b0 * H + r * ch);
          ctx.fillRect(x0, y0, Math.round(a0 * W + (c + 1) * cw) - x0, Math.round(b0 * H + (r + 1) * ch) - y0);
        }
      }
    }
    if (partial) {
      ctx.lineWidth = 2 * dpr;
      ctx.strokeStyle = "#1c2226";
      ctx.setLineDash([6 * dpr, 4 * dpr]);
      ctx.strokeRect(a0 * W, b0 * H, (a1 - a0) * W, (b1 - b0) * H);
      ctx.setLineDash([]);
    }
    if (this.showPairs) {
      for (const pair of this.pairs) {
        const dim = this.active !== null && this.active !== pair.n;
        ctx.globalAlpha = dim ? 0.25 : 1;
        const [x0, y0, x1, y1] = pair.box;
        const inset = 1.5 * dpr;
        const rx = x0 * W + inset;
        const ry = y0 * H + inset;
        const rw = (x1 - x0) * W - 2 * inset;
        const rh = (y1 - y0) * H - 2 * inset;
        ctx.lineWidth = 5 * dpr;
        ctx.strokeStyle = "rgba(255, 255, 255, 0.9)";
        ctx.strokeRect(rx, ry, rw, rh);
        ctx.lineWidth = (this.active === pair.n ? 3.5 : 2.5) * dpr;
        ctx.strokeStyle = pair.colour;
        ctx.strokeRect(rx, ry, rw, rh);
        const size = 16 * dpr;
        ctx.fillStyle = pair.colour;
        ctx.fillRect(rx, ry, size, size);
        ctx.fillStyle = "#ffffff";
        ctx.font = `700 ${11 * dpr}px system-ui, sans-serif`;
        ctx.textAlign = "center";
        ctx.textBaseline = "middle";
        ctx.fillText(String(pair.n), rx + size / 2, ry + size / 2 + 0.5 * dpr);
      }
      ctx.globalAlpha = 1;
    }
  }

  destroy() {
    this.observer.disconnect();
  }
}

function describeMap(stats, area, score, who) {
  if (!stats.rows) return `No heat map for the ${who}.`;
  const cellBox = [
    stats.best[1] / stats.cols,
    stats.best[0] / stats.rows,
    (stats.best[1] + 1) / stats.cols,
    (stats.best[0] + 1) / stats.rows,
  ];
  const where = whereIs(within(area, cellBox));
  return `Heat map over the ${who}, ${stats.rows} by ${stats.cols} cells that add up to the score. ` +
    `The strongest cell is at the ${where} and holds ${formatPercent(score ? stats.max / score : 0)} of the score.`;
}

let overlays = [];

/** Fill `body` with the explanation `data` (from /api/explain). */
export function renderExplanation(body, data, ctx) {
  overlays.forEach((o) => o.destroy());
  overlays = [];
  body.replaceChildren();
  const match = data.match;
  const queryArea = ctx.box || [0, 0, 1, 1];
  const pairs = data.pairs.map((p, i) => ({
    n: i + 1,
    colour: PAIR_COLOURS[i % PAIR_COLOURS.length],
    query: within(queryArea, p.query_box),
    match: p.match_box,
    value: p.value,
  }));

  // Score and the caution that goes with it.
  const layerText = ctx.layerHint ? `the ${ctx.layer} layer (finds ${ctx.layerHint})` : `the ${ctx.layer} layer`;
  const summary = el(
    "div",
    { class: "explain-summary" },
    el("div", {}, el("span", { class: "big-score", text: formatScore(data.score) }), el("span", { class: "big-score-label", text: "score" })),
    el(
      "div",
      {},
      el("p", {}, `${match.name} compared with ${ctx.queryLabel} on ${layerText}${ctx.box ? ", using the marked region of the query only" : ""}. ` +
        "1.000 would mean the network sees no difference at this layer."),
      el("p", { class: "verdict-note", text: "This score is evidence for you to review, not a verdict: look at both images yourself before deciding they show the same thing." }),
    ),
  );
  body.append(summary);
  if (Math.abs(data.indexed_score - data.score) > 0.002) {
    body.append(el("p", { class: "message message-error", role: "note", text:
      `the file seems to have changed since it was indexed: against the stored description the score is ${formatScore(data.indexed_score)}. Run kinscope index again.` }));
  }

  // Controls.
  const heatToggle = el("input", { type: "checkbox", id: "toggle-heat", checked: true });
  const pairToggle = el("input", { type: "checkbox", id: "toggle-pairs", checked: true });
  body.append(
    el(
      "div",
      { class: "explain-controls" },
      el("label", { for: "toggle-heat" }, heatToggle, "Show heat maps"),
      el("label", { for: "toggle-pairs" }, pairToggle, "Show linked regions"),
    ),
  );

  // The two images.
  const figure = (who, title, subtitle, src, alt) => {
    const img = el("img", { src, alt, draggable: "false" });
    const canvas = el("canvas", { class: `heat-canvas heat-${who}`, role: "img" });
    const readout = el("span", { class: "cell-readout", "aria-hidden": "true", text: "\u00a0" });
    const fig = el(
      "figure",
      { class: `compare-${who}` },
      el("div", { class: "image-frame" }, img, canvas),
      el("figcaption", {}, el("strong", { text: title }), el("span", { class: "path", text: subtitle }), el("br"), readout),
    );
    return { fig, img, canvas, readout };
  };
  const q = figure("query", "Query", ctx.queryLabel, ctx.queryImage, `The query image, ${ctx.queryLabel}`);
  const m = figure("match", `Match: ${match.name}`, match.path, match.image || `/media/items/${match.id}/image`, `The matched archive image, ${match.name}`);
  body.append(el("div", { class: "compare" }, q.fig, m.fig));

  const qStats = mapStats(data.query_map);
  const mStats = mapStats(data.match_map);
  const legend = el(
    "div",
    { class: "legend", id: "heat-legend" },
    el("span", { class: "legend-ends", text: "none" }),
    el("span", { class: "legend-ramp", "aria-hidden": "true" }),
    el("span", { class: "legend-ends", text: "largest cell" }),
    el("span", {}, `The cells over each image add up to the score, ${formatScore(data.score)}: the brighter a cell, ` +
      "the more of the similarity came from that part of the image. Point at a cell to read its value. " +
      "Cells along the frame's edges are often bright on the middle layers: the network reacts to the border " +
      "of any picture, so bright edges alone say little about the content."),
  );
  body.append(legend);

  q.canvas.setAttribute("aria-label", describeMap(qStats, queryArea, data.score, "query"));
  m.canvas.setAttribute("aria-label", describeMap(mStats, [0, 0, 1, 1], data.score, "match"));
  const qo = new Overlay(q.img, q.canvas, {
    map: data.query_map, area: queryArea, score: data.score, readout: q.readout, who: "query",
    pairs: pairs.map((p) => ({ n: p.n, colour: p.colour, box: p.query })),
  });
  const mo = new Overlay(m.img, m.canvas, {
    map: data.match_map, area: [0, 0, 1, 1], score: data.score, readout: m.readout, who: "match",
    pairs: pairs.map((p) => ({ n: p.n, colour: p.colour, box: p.match })),
  });
  overlays = [qo, mo];
  heatToggle.addEventListener("change", () => {
    overlays.forEach((o) => { o.showHeat = heatToggle.checked; o.draw(); });
    legend.hidden = !heatToggle.checked;
  });
  pairToggle.addEventListener("change", () => {
    overlays.forEach((o) => { o.showPairs = pairToggle.checked; o.draw(); });
  });

  // Region pairs.
  const highlight = (n) => overlays.forEach((o) => { o.active = n; o.draw(); });
  const pairList = el("ol", { class: "pair-list", id: "pair-list" });
  for (const p of pairs) {
    const item = el(
      "li",
      { tabindex: "0", class: "pair", dataset: { n: p.n } },
      el("span", { class: "pair-chip", text: String(p.n) }),
      el("span", {}, `query ${whereIs(p.query)} \u2194 match ${whereIs(p.match)}`),
      el("span", { class: "pair-share", text: `${formatPercent(data.score ? p.value / data.score : 0)} of the score` }),
    );
    item.querySelector(".pair-chip").style.backgroundColor = p.colour;
    const on = () => { item.classList.add("is-active"); highlight(p.n); };
    const off = () => { item.classList.remove("is-active"); highlight(null); };
    item.addEventListener("mouseenter", on);
    item.addEventListener("mouseleave", off);
    item.addEventListener("focus", on);
    item.addEventListener("blur", off);
    pairList.append(item);
  }
  const details = el("div", { class: "explain-details" });
  body.append(details);
  details.append(
    el(
      "section",
      { class: "explain-section", "aria-labelledby": "pairs-heading" },
      el("h3", { id: "pairs-heading", text: "Regions that correspond" }),
      el("p", { class: "fine", text: "The strongest links between a region of the query and a region of the match, drawn on both images with the same number and colour. Each region is used once. Point at a row to single it out." }),
      pairs.length ? pairList : el("p", { text: "No region pairs for this match." }),
    ),
  );

  // Feature detectors.
  const channelList = el("ol", { class: "channel-list", id: "channel-list" });
  let together = 0;
  const topShare = Math.max(1e-12, ...data.channels.map((c) => c.share));
  for (const c of data.channels) {
    together += c.share;
    const bar = el("span");
    bar.style.width = `${Math.max(1, Math.min(100, (c.share / topShare) * 100)).toFixed(1)}%`;
    const exemplars = el("ul", { class: "exemplars", "aria-label": `Archive patches that excite detector ${c.channel} most` });
    for (const e of c.exemplars) {
      exemplars.append(
        el("li", {}, el("a", { href: `/items/${e.id}`, title: `Archive item ${e.id}, the ${whereIs(e.box)} of the image` },
          el("img", { src: e.patch, loading: "lazy", width: 64, height: 64,
            alt: `Patch from archive item ${e.id} (${whereIs(e.box)}) where detector ${c.channel} responds strongly` }))),
      );
    }
    channelList.append(
      el(
        "li",
        { class: "channel" },
        el(
          "div",
          {},
          el("span", { class: "channel-name", text: `Detector ${c.channel}` }),
          " ",
          el("span", { class: "channel-share", text: `${formatPercent(c.share)} of the score` }),
          el("div", { class: "share-bar", "aria-hidden": "true" }, bar),
        ),
        c.exemplars.length ? exemplars : el("p", { class: "fine", text: "No archive patches recorded for this detector yet." }),
      ),
    );
  }
  const rest = ctx.channels ? ` The rest of the score is spread over the other ${ctx.channels - data.channels.length} detectors of this layer.` : "";
  details.append(
    el(
      "section",
      { class: "explain-section", "aria-labelledby": "channels-heading" },
      el("h3", { id: "channels-heading", text: "Feature detectors that carried most of the score" }),
      el("p", { class: "fine", text: "Each detector is one channel of the layer: it responds to one kind of visual pattern and has no name. " +
        "Beside each are the places in the archive where it responds most strongly, to show what it looks for. " +
        `Together these ${data.channels.length} carry ${formatPercent(together)} of the score.${rest} ` +
        "The bars compare the detectors with one another." }),
      channelList,
    ),
  );

  const actions = el("div", { class: "explain-actions" }, el("a", { class: "button", href: match.page || `/items/${match.id}`, text: "Open the match's page" }));
  if (ctx.onUse) {
    actions.append(el("button", { type: "button", class: "button", text: "Search with the match", onclick: () => ctx.onUse(match) }));
  }
  body.append(actions);
}

export function clearExplanation(body) {
  overlays.forEach((o) => o.destroy());
  overlays = [];
  body.replaceChildren();
}
