// The "why it matched" view: the score and the similarity beyond the archive's average, heat maps over
// both images (the exact split of one of them over feature-map cells), region pairs that show the same
// content (stepped through with buttons or arrow keys), and the feature detectors that carried it.
import { api, el, formatPercent, formatScore, whereIs } from "./common.js";
import { pairSection, signedPercent } from "./explain-pairs.js";

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
  constructor(img, canvas, { map, area, pairs, score, readout, who, what }) {
    this.img = img;
    this.canvas = canvas;
    this.map = map;
    this.area = area || [0, 0, 1, 1];
    this.pairs = pairs; // [{box (whole-image fractions), colour, n}]
    this.score = score;
    this.readout = readout;
    this.who = who;
    this.what = what;
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
    this.readoutText(v < 0
      ? `this cell: ${v.toFixed(5)}, below zero: it looks less like the other image than an average image does`
      : `this cell: ${v.toFixed(5)}, ${signedPercent(this.score ? v / this.score : 0)} of ${this.what}`);
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

/** What the heat maps add up to, in words, for each mode. */
function scoreWords(mode) {
  return mode === "centred" ? "the similarity beyond the archive's average" : "the score";
}

function describeMap(stats, area, data, who) {
  if (!stats.rows) return `No heat map for the ${who}.`;
  const cellBox = [
    stats.best[1] / stats.cols,
    stats.best[0] / stats.rows,
    (stats.best[1] + 1) / stats.cols,
    (stats.best[0] + 1) / stats.rows,
  ];
  const where = whereIs(within(area, cellBox));
  return `Heat map over the ${who}, ${stats.rows} by ${stats.cols} cells that add up to ${scoreWords(data.mode)}, ` +
    `${formatScore(data.score)}. The strongest cell is at the ${where} and holds ` +
    `${formatPercent(data.score > 0 ? stats.max / data.score : 0)} of it.`;
}

let overlays = [];
let modeRequest = 0;

/** The explanation of the same pair in another mode, fetched once and kept with the context. */
async function switchMode(body, data, ctx, mode, status) {
  ctx.byMode = ctx.byMode || {};
  ctx.byMode[data.mode] = data;
  const seq = ++modeRequest;
  let next = ctx.byMode[mode];
  if (!next) {
    status.textContent = "Working it out\u2026";
    try {
      next = await api("/api/explain", { upload: data.query.upload, item: data.query.item, box: data.query.box,
        layer: data.layer, match: data.match.id, mode });
    } catch (err) {
      status.textContent = err.message;
      return;
    }
    ctx.byMode[mode] = next;
  }
  if (seq !== modeRequest || !body.isConnected) return;
  renderExplanation(body, next, ctx);
  const radio = body.querySelector(`input[name="explain-mode"][value="${mode}"]`);
  if (radio) radio.focus();
}

function summaryBlock(data, ctx) {
  const match = data.match;
  const layerText = ctx.layerHint ? `the ${ctx.layer} layer (finds ${ctx.layerHint})` : `the ${ctx.layer} layer`;
  const summary = el(
    "div",
    { class: "explain-summary" },
    el("p", { class: "span-all" }, `${match.name} compared with ${ctx.queryLabel} on ${layerText}` +
      `${ctx.box ? ", using the marked region of the query only" : ""}.`),
    el("div", {}, el("span", { class: "big-score", text: formatScore(data.cosine) }), el("span", { class: "big-score-label", text: "score" })),
    el("p", { class: "score-meaning" }, "How alike the two images look to the network at this layer, the number the results are ranked by: " +
      "1.000 would mean no difference, and unrelated images often score high too."),
  );
  if (data.centred !== null && data.centred !== undefined) {
    summary.append(
      el("div", {}, el("span", { class: "big-score-centred", text: formatScore(data.centred) }),
        el("span", { class: "big-score-label", text: "beyond the archive's average" })),
      el("p", { class: "score-meaning" }, "The same comparison after taking away what every image of this archive has in common: " +
        "what these two share that other images do not (0 means no more alike than two average images of the archive)."),
    );
  }
  summary.append(el("p", { class: "verdict-note span-all", text: "This score is evidence for you to review, not a verdict: look at both images yourself before deciding they show the same thing." }));
  return summary;
}

/** Fill `body` with the explanation `data` (from /api/explain). */
export function renderExplanation(body, data, ctx) {
  overlays.forEach((o) => o.destroy());
  overlays = [];
  body.replaceChildren();
  const match = data.match;
  const what = scoreWords(data.mode);
  const queryArea = ctx.box || [0, 0, 1, 1];
  const pairs = data.pairs.map((p, i) => ({
    n: i + 1,
    colour: PAIR_COLOURS[i % PAIR_COLOURS.length],
    query: within(queryArea, p.query_box),
    match: p.match_box,
    share: p.share,
    similarity: p.similarity,
  }));

  body.append(summaryBlock(data, ctx));
  if (Math.abs(data.indexed_score - data.cosine) > 0.002) {
    body.append(el("p", { class: "message message-error", role: "note", text:
      `the file seems to have changed since it was indexed: against the stored description the score is ${formatScore(data.indexed_score)}. Run kinscope index again.` }));
  }

  // Controls: what is drawn, and what the heat maps divide.
  const heatToggle = el("input", { type: "checkbox", id: "toggle-heat", checked: true });
  const pairToggle = el("input", { type: "checkbox", id: "toggle-pairs", checked: true });
  const modeStatus = el("span", { class: "fine", role: "status", "aria-live": "polite" });
  const modeChoice = el("fieldset", { class: "mode-choice" }, el("legend", { text: "Heat maps divide" }));
  for (const [value, label] of [["centred", "the similarity beyond the archive's average"], ["cosine", "the score"]]) {
    const input = el("input", { type: "radio", name: "explain-mode", id: `explain-mode-${value}`, value,
      checked: data.mode === value, disabled: value === "centred" && (data.centred === null || data.centred === undefined) });
    input.addEventListener("change", () => { if (input.checked) switchMode(body, data, ctx, value, modeStatus); });
    modeChoice.append(el("label", { for: `explain-mode-${value}` }, input, label));
  }
  const controls = el(
    "div",
    { class: "explain-controls" },
    el("label", { for: "toggle-heat" }, heatToggle, "Show heat maps"),
    el("label", { for: "toggle-pairs" }, pairToggle, "Show linked regions"),
    modeChoice,
    modeStatus,
  );
  body.append(controls);

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
  const meaning = data.mode === "centred"
    ? "Cells below zero are left dark: there the image looks less like the other one than an average image does. " +
      "What every image of the archive has, the frame's edges included, adds almost nothing here."
    : "Cells along the frame's edges are often bright on the middle layers: the network reacts to the border " +
      "of any picture, so bright edges alone say little about the content." +
      (data.centred === null || data.centred === undefined ? "" : " The other choice above takes that away.");
  const legend = el(
    "div",
    { class: "legend", id: "heat-legend" },
    el("span", { class: "legend-ends", text: "none" }),
    el("span", { class: "legend-ramp", "aria-hidden": "true" }),
    el("span", { class: "legend-ends", text: "largest cell" }),
    el("span", {}, `The cells over each image add up to ${what}, ${formatScore(data.score)}: the brighter a cell, ` +
      `the more of it came from that part of the image. Point at a cell to read its value. ${meaning}`),
  );
  body.append(legend);

  q.canvas.setAttribute("aria-label", describeMap(qStats, queryArea, data, "query"));
  m.canvas.setAttribute("aria-label", describeMap(mStats, [0, 0, 1, 1], data, "match"));
  const qo = new Overlay(q.img, q.canvas, {
    map: data.query_map, area: queryArea, score: data.score, readout: q.readout, who: "query", what,
    pairs: pairs.map((p) => ({ n: p.n, colour: p.colour, box: p.query })),
  });
  const mo = new Overlay(m.img, m.canvas, {
    map: data.match_map, area: [0, 0, 1, 1], score: data.score, readout: m.readout, who: "match", what,
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

  const details = el("div", { class: "explain-details" });
  body.append(details);
  const pairUI = pairSection(data, pairs, what, (n) => overlays.forEach((o) => { o.active = n; o.draw(); }));
  details.append(pairUI.section);
  if (pairUI.quick) controls.insertBefore(pairUI.quick, modeChoice);
  details.append(channelSection(data, ctx, what));

  const actions = el("div", { class: "explain-actions" }, el("a", { class: "button", href: match.page || `/items/${match.id}`, text: "Open the match's page" }));
  if (ctx.onUse) {
    actions.append(el("button", { type: "button", class: "button", text: "Search with the match", onclick: () => ctx.onUse(match) }));
  }
  body.append(actions);
}

function channelSection(data, ctx, what) {
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
          el("span", { class: "channel-share", text: `${formatPercent(c.share)} of ${what}` }),
          el("div", { class: "share-bar", "aria-hidden": "true" }, bar),
        ),
        c.exemplars.length ? exemplars : el("p", { class: "fine", text: "No archive patches recorded for this detector yet." }),
      ),
    );
  }
  const rest = ctx.channels ? ` The rest is spread over the other ${ctx.channels - data.channels.length} detectors of this layer.` : "";
  return el(
    "section",
    { class: "explain-section", "aria-labelledby": "channels-heading" },
    el("h3", { id: "channels-heading", text: `Feature detectors that carried most of ${what}` }),
    el("p", { class: "fine", text: "Each detector is one channel of the layer: it responds to one kind of visual pattern and has no name. " +
      "Beside each are the places in the archive, away from the frame's edge, where it responds most strongly, to show what it looks for. " +
      `Together these ${data.channels.length} carry ${formatPercent(together)} of ${what}.${rest} ` +
      "The bars compare the detectors with one another." }),
    data.channels.length ? channelList : el("p", { text: "No detector adds to it." }),
  );
}

export function clearExplanation(body) {
  modeRequest += 1;
  overlays.forEach((o) => o.destroy());
  overlays = [];
  body.replaceChildren();
}
