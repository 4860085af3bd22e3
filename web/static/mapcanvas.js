// The map's canvas: every point written straight into one ImageData (a million points cost one pass
// over typed arrays, not a million draw calls), thumbnails only when few points are in view, a grid
// of cells to find what is under the pointer or inside a selection without scanning every point.

const GRID = 256; // cells per side of the lookup grid over the unit square
export const THUMB_LIMIT = 160; // thumbnails are drawn once at most this many points are in view
const THUMB_CACHE = 600; // decoded thumbnails kept (least recently drawn out first)
const THUMB_LOADS = 6; // thumbnail requests under way at once

function cssColour(name, fallback) {
  const v = getComputedStyle(document.documentElement).getPropertyValue(name).trim();
  return v || fallback;
}

function packed(hex) {
  // "#rrggbb" -> 0xAABBGGRR, the byte order of a little-endian Uint32 view of ImageData
  const v = parseInt(hex.replace("#", ""), 16);
  return (0xff << 24) | ((v & 0xff) << 16) | (v & 0xff00) | ((v >> 16) & 0xff);
}

export class MapCanvas {
  constructor(canvas, { onChange } = {}) {
    this.canvas = canvas;
    this.ctx = canvas.getContext("2d");
    this.onChange = onChange || (() => {});
    this.n = 0;
    this.scale = 1;
    this.tx = 0;
    this.ty = 0;
    this.active = null; // Uint8Array: 1 = passes the filter, 0 = greyed
    this.selected = new Uint8Array(0);
    this.highlight = -1; // index of the item shown in the side panel
    this.overlay = null; // {kind: "box", x0, y0, x1, y1} | {kind: "lasso", points: [[x, y], ...]} in CSS pixels
    this.thumbs = new Map();
    this.loading = 0;
    this.queue = [];
    this.level = "points";
    this.drawnThumbs = 0;
    this.visible = 0;
    this.colours = {
      paper: cssColour("--surface", "#ffffff"),
      point: packed(cssColour("--accent", "#285e54")),
      grey: packed(cssColour("--line", "#d6d0c4")),
      chosen: packed(cssColour("--focus", "#b4530b")),
      chosenCss: cssColour("--focus", "#b4530b"),
      accentCss: cssColour("--accent", "#285e54"),
    };
    this.pending = false;
    new ResizeObserver(() => this.resize()).observe(canvas);
  }

  /** Points: x and y in the unit square (Float32Array), ids (Float64Array). */
  setPoints(ids, x, y, n) {
    Object.assign(this, { ids, x, y, n });
    this.selected = new Uint8Array(n);
    this.active = new Uint8Array(n).fill(1);
    this.buildGrid();
    this.fit();
  }

  buildGrid() {
    const { n, x, y } = this;
    const cell = new Int32Array(n);
    const start = new Int32Array(GRID * GRID + 1);
    for (let i = 0; i < n; i++) {
      const cx = Math.min(GRID - 1, Math.max(0, (x[i] * GRID) | 0));
      const cy = Math.min(GRID - 1, Math.max(0, (y[i] * GRID) | 0));
      cell[i] = cy * GRID + cx;
      start[cell[i] + 1]++;
    }
    for (let c = 0; c < GRID * GRID; c++) start[c + 1] += start[c];
    const fill = start.slice(0, GRID * GRID);
    const order = new Int32Array(n);
    for (let i = 0; i < n; i++) order[fill[cell[i]]++] = i;
    this.cellStart = start;
    this.order = order;
  }

  /** Indices of the points inside map rectangle [x0, x1] x [y0, y1], cell by cell. */
  pointsIn(x0, y0, x1, y1, visit) {
    const c0 = Math.max(0, Math.floor(x0 * GRID)), c1 = Math.min(GRID - 1, Math.floor(x1 * GRID));
    const r0 = Math.max(0, Math.floor(y0 * GRID)), r1 = Math.min(GRID - 1, Math.floor(y1 * GRID));
    for (let r = r0; r <= r1; r++) {
      for (let c = c0; c <= c1; c++) {
        const cell = r * GRID + c;
        for (let k = this.cellStart[cell]; k < this.cellStart[cell + 1]; k++) {
          const i = this.order[k];
          if (this.x[i] >= x0 && this.x[i] <= x1 && this.y[i] >= y0 && this.y[i] <= y1) visit(i);
        }
      }
    }
  }

  size() {
    const r = this.canvas.getBoundingClientRect();
    return { w: Math.max(1, r.width), h: Math.max(1, r.height) };
  }

  resize() {
    const dpr = window.devicePixelRatio || 1;
    const { w, h } = this.size();
    this.canvas.width = Math.round(w * dpr);
    this.canvas.height = Math.round(h * dpr);
    this.redraw();
  }

  fit() {
    const { w, h } = this.size();
    this.scale = 0.94 * Math.min(w, h);
    this.tx = (w - this.scale) / 2;
    this.ty = (h - this.scale) / 2;
    this.redraw();
  }

  zoomAt(factor, sx, sy) {
    const min = 0.2 * Math.min(this.size().w, this.size().h);
    const next = Math.min(5e6, Math.max(min, this.scale * factor));
    const f = next / this.scale;
    this.tx = sx - (sx - this.tx) * f;
    this.ty = sy - (sy - this.ty) * f;
    this.scale = next;
    this.redraw();
  }

  pan(dx, dy) {
    this.tx += dx;
    this.ty += dy;
    this.redraw();
  }

  toMap(sx, sy) {
    return [(sx - this.tx) / this.scale, (sy - this.ty) / this.scale];
  }

  toScreen(i) {
    return [this.x[i] * this.scale + this.tx, this.y[i] * this.scale + this.ty];
  }

  /** The point nearest to a screen position within `radius` CSS pixels, or -1. */
  nearest(sx, sy, radius = 8) {
    if (!this.n) return -1;
    const [mx, my] = this.toMap(sx, sy);
    const r = radius / this.scale;
    let best = -1, bestD = Infinity;
    this.pointsIn(mx - r, my - r, mx + r, my + r, (i) => {
      const d = (this.x[i] - mx) ** 2 + (this.y[i] - my) ** 2;
      if (d < bestD) { bestD = d; best = i; }
    });
    return best;
  }

  redraw() {
    if (this.pending) return;
    this.pending = true;
    requestAnimationFrame(() => {
      this.pending = false;
      this.draw();
    });
  }

  visibleRange() {
    const { w, h } = this.size();
    const [x0, y0] = this.toMap(0, 0);
    const [x1, y1] = this.toMap(w, h);
    return [x0, y0, x1, y1];
  }

  draw() {
    const { ctx, canvas } = this;
    const dpr = canvas.width / this.size().w;
    const W = canvas.width, H = canvas.height;
    const image = ctx.createImageData(W, H);
    const px = new Uint32Array(image.data.buffer);
    px.fill(packed(this.colours.paper));
    // Dots grow from one pixel to a few as the view zooms in (as points thin out on screen).
    const density = this.n / Math.max(1, (this.scale * this.scale) / 10000);
    const dot = Math.max(1, Math.min(6, Math.round(dpr * (density > 200 ? 1 : density > 50 ? 2 : density > 5 ? 3 : 5))));
    const s = this.scale * dpr, tx = this.tx * dpr, ty = this.ty * dpr;
    let visible = 0;
    const inView = [];
    // Three passes so that greyed points lie under the others and selected ones on top.
    for (const pass of [0, 1, 2]) {
      const colour = pass === 0 ? this.colours.grey : pass === 1 ? this.colours.point : this.colours.chosen;
      for (let i = 0; i < this.n; i++) {
        const kind = this.selected[i] ? 2 : this.active[i] ? 1 : 0;
        if (kind !== pass) continue;
        const cx = (this.x[i] * s + tx) | 0, cy = (this.y[i] * s + ty) | 0;
        if (cx < 0 || cy < 0 || cx >= W || cy >= H) continue;
        visible++;
        if (inView.length <= THUMB_LIMIT) inView.push(i);
        for (let dy = 0; dy < dot && cy + dy < H; dy++) {
          const row = (cy + dy) * W;
          for (let dx = 0; dx < dot && cx + dx < W; dx++) px[row + cx + dx] = colour;
        }
      }
    }
    ctx.putImageData(image, 0, 0);
    ctx.save();
    ctx.scale(dpr, dpr);
    this.visible = visible;
    // Thumbnails once few points are in view and they would cover at most about half of it.
    const side = this.thumbSide(), { w, h } = this.size();
    this.level = visible > 0 && visible <= THUMB_LIMIT && visible * side * side <= 0.5 * w * h ? "thumbnails" : "points";
    this.drawnThumbs = this.level === "thumbnails" ? this.drawThumbs(inView) : 0;
    this.drawOverlay();
    ctx.restore();
    this.onChange(this);
  }

  thumbSide() {
    // About a fifth of the distance at which points would fill the view, within 40..128 CSS pixels.
    return Math.max(40, Math.min(128, this.scale / Math.sqrt(Math.max(1, this.n)) * 0.9));
  }

  drawThumbs(indices) {
    const { ctx } = this;
    const side = this.thumbSide();
    let drawn = 0;
    for (const i of indices) {
      const img = this.thumb(this.ids[i]);
      if (!img) continue;
      const [sx, sy] = this.toScreen(i);
      ctx.globalAlpha = this.active[i] ? 1 : 0.3;
      const k = side / Math.max(img.naturalWidth, img.naturalHeight);
      const w = img.naturalWidth * k, h = img.naturalHeight * k;
      ctx.drawImage(img, sx - w / 2, sy - h / 2, w, h);
      ctx.globalAlpha = 1;
      ctx.lineWidth = this.selected[i] || i === this.highlight ? 3 : 1;
      ctx.strokeStyle = this.selected[i] || i === this.highlight ? this.colours.chosenCss : this.colours.accentCss;
      ctx.strokeRect(sx - w / 2, sy - h / 2, w, h);
      drawn++;
    }
    return drawn;
  }

  /** A loaded thumbnail, or null (and its request queued). */
  thumb(id) {
    const entry = this.thumbs.get(id);
    if (entry) {
      this.thumbs.delete(id); // re-insert: most recently used last
      this.thumbs.set(id, entry);
      return entry.complete && entry.naturalWidth ? entry : null;
    }
    const img = new Image();
    img.decoding = "async";
    img.alt = "";
    this.thumbs.set(id, img);
    this.queue.push([img, id]);
    this.pump();
    while (this.thumbs.size > THUMB_CACHE) this.thumbs.delete(this.thumbs.keys().next().value);
    return null;
  }

  pump() {
    while (this.loading < THUMB_LOADS && this.queue.length) {
      const [img, id] = this.queue.shift();
      if (!this.thumbs.has(id)) continue; // dropped from the cache before its turn
      this.loading++;
      const done = () => {
        this.loading--;
        this.pump();
        this.redraw();
      };
      img.onload = done;
      img.onerror = done;
      img.src = `/media/items/${id}/thumbnail?size=128`;
    }
  }

  drawOverlay() {
    const { ctx, overlay } = this;
    if (!overlay) return;
    ctx.strokeStyle = this.colours.chosenCss;
    ctx.lineWidth = 2;
    ctx.setLineDash([6, 4]);
    ctx.beginPath();
    if (overlay.kind === "box") {
      ctx.rect(overlay.x0, overlay.y0, overlay.x1 - overlay.x0, overlay.y1 - overlay.y0);
    } else {
      overlay.points.forEach(([x, y], k) => (k ? ctx.lineTo(x, y) : ctx.moveTo(x, y)));
      ctx.closePath();
    }
    ctx.stroke();
    ctx.setLineDash([]);
  }

  /** Select the active points inside a screen box or lasso polygon (CSS pixels); returns the count. */
  selectShape(shape, add = false) {
    if (!add) this.selected.fill(0);
    const pts = shape.kind === "box"
      ? [[shape.x0, shape.y0], [shape.x1, shape.y0], [shape.x1, shape.y1], [shape.x0, shape.y1]]
      : shape.points;
    if (pts.length < 3) return this.selectedCount();
    const map = pts.map(([sx, sy]) => this.toMap(sx, sy));
    const xs = map.map((p) => p[0]), ys = map.map((p) => p[1]);
    this.pointsIn(Math.min(...xs), Math.min(...ys), Math.max(...xs), Math.max(...ys), (i) => {
      if (this.active[i] && inside(this.x[i], this.y[i], map)) this.selected[i] = 1;
    });
    this.redraw();
    return this.selectedCount();
  }

  selectedCount() {
    let c = 0;
    for (let i = 0; i < this.n; i++) c += this.selected[i];
    return c;
  }

  selectedIds() {
    const out = [];
    for (let i = 0; i < this.n; i++) if (this.selected[i]) out.push(this.ids[i]);
    return out;
  }
}

/** Even-odd rule: is (x, y) inside the polygon? */
function inside(x, y, poly) {
  let hit = false;
  for (let i = 0, j = poly.length - 1; i < poly.length; j = i++) {
    const [xi, yi] = poly[i], [xj, yj] = poly[j];
    if ((yi > y) !== (yj > y) && x < ((xj - xi) * (y - yi)) / (yj - yi) + xi) hit = !hit;
  }
  return hit;
}
