// The region box on the query image: drag on the image or type the four edges (percent of the image).
// It keeps no search state of its own: `show(box)` draws what the page holds, and `onChange(box)` (a box
// of fractions [x0, y0, x1, y1], or null for the whole image) is called when the person sets a new one.
import { showMessage } from "./common.js";

const MIN_REGION = 0.04; // a region narrower than this (fraction of the image) is taken as a stray click

function ordered(a, b) {
  return [Math.min(a[0], b[0]), Math.min(a[1], b[1]), Math.max(a[0], b[0]), Math.max(a[1], b[1])];
}

/** Wire the box up. `els`: {canvas, image, status, clear, form, error}; `hasQuery()` says whether there is an
    image to mark; `current()` gives the box the page holds (redrawn when the image changes size). */
export function setUpRegion(els, { hasQuery, current, onChange }) {
  const { canvas, image, status, clear, form, error } = els;
  let drag = null;

  function fraction(e) {
    const rect = canvas.getBoundingClientRect();
    return [
      Math.max(0, Math.min(1, (e.clientX - rect.left) / rect.width)),
      Math.max(0, Math.min(1, (e.clientY - rect.top) / rect.height)),
    ];
  }

  function draw(box, live = false) {
    const dpr = window.devicePixelRatio || 1;
    canvas.width = Math.round(image.clientWidth * dpr);
    canvas.height = Math.round(image.clientHeight * dpr);
    const ctx = canvas.getContext("2d");
    ctx.clearRect(0, 0, canvas.width, canvas.height);
    if (!box) return;
    const W = canvas.width;
    const H = canvas.height;
    const [x0, y0, x1, y1] = box;
    ctx.fillStyle = "rgba(245, 243, 238, 0.7)";
    ctx.fillRect(0, 0, W, H);
    ctx.clearRect(x0 * W, y0 * H, (x1 - x0) * W, (y1 - y0) * H);
    ctx.lineWidth = 4 * dpr;
    ctx.strokeStyle = "rgba(255, 255, 255, 0.9)";
    ctx.strokeRect(x0 * W, y0 * H, (x1 - x0) * W, (y1 - y0) * H);
    ctx.lineWidth = 2 * dpr;
    ctx.strokeStyle = live ? "#b4530b" : "#285e54";
    ctx.setLineDash(live ? [6 * dpr, 4 * dpr] : []);
    ctx.strokeRect(x0 * W, y0 * H, (x1 - x0) * W, (y1 - y0) * H);
    ctx.setLineDash([]);
  }

  function show(box) {
    draw(box);
    clear.hidden = !box;
    canvas.dataset.box = box ? box.map((v) => v.toFixed(3)).join(",") : "";
    if (!box) {
      status.textContent = "Searching by the whole image.";
      return;
    }
    const [x0, y0, x1, y1] = box;
    status.textContent = `Searching by the marked region only (${Math.round((x1 - x0) * 100)}% × ${Math.round((y1 - y0) * 100)}% of the image).`;
    const f = form.elements;
    f.x0.value = Math.round(x0 * 100);
    f.y0.value = Math.round(y0 * 100);
    f.x1.value = Math.round(x1 * 100);
    f.y1.value = Math.round(y1 * 100);
  }

  canvas.addEventListener("pointerdown", (e) => {
    if (!hasQuery() || e.button !== 0) return;
    e.preventDefault();
    canvas.setPointerCapture(e.pointerId);
    const p = fraction(e);
    drag = { from: p, to: p };
  });
  canvas.addEventListener("pointermove", (e) => {
    if (!drag) return;
    drag.to = fraction(e);
    draw(ordered(drag.from, drag.to), true);
  });
  canvas.addEventListener("pointerup", (e) => {
    if (!drag) return;
    drag.to = fraction(e);
    const box = ordered(drag.from, drag.to);
    drag = null;
    if (box[2] - box[0] < MIN_REGION || box[3] - box[1] < MIN_REGION) {
      show(current()); // too small to mean anything: keep what was there
      return;
    }
    onChange(box);
  });
  canvas.addEventListener("pointercancel", () => {
    drag = null;
    show(current());
  });
  new ResizeObserver(() => draw(current())).observe(image);
  image.addEventListener("load", () => draw(current()));

  clear.addEventListener("click", () => onChange(null));
  form.addEventListener("submit", (e) => {
    e.preventDefault();
    const f = form.elements;
    const v = ["x0", "y0", "x1", "y1"].map((k) => Number(f[k].value) / 100);
    if (v.some((x) => !Number.isFinite(x) || x < 0 || x > 1) || v[0] >= v[2] || v[1] >= v[3]) {
      showMessage(error, "the region needs left < right and top < bottom, each between 0 and 100.");
      return;
    }
    showMessage(error, "");
    onChange(v[0] === 0 && v[1] === 0 && v[2] === 1 && v[3] === 1 ? null : v);
  });

  return { show };
}
