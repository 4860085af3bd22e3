// The map page: loads the layout from /api/map in chunks, filters by folder and date, hover and
// click on items, box and lasso selection with the paths downloaded as CSV or JSON.
import { api, ApiError, breakable, setRoot, shortFolder, showMessage } from "./common.js";
import { MapCanvas } from "./mapcanvas.js";

const app = document.getElementById("map-app");
const canvasEl = document.getElementById("map-canvas");
const statusEl = document.getElementById("map-status");
const errorEl = document.getElementById("map-error");
const tip = document.getElementById("map-tip");
const DAY_MS = 86400000;

const state = { layer: app.dataset.layer, folders: [], folder: null, day: null, total: 0, grid: 65535, mode: "move" };
const items = new Map(); // id -> /api/items answer (hover and the chosen item)

const view = new MapCanvas(canvasEl, {
  onChange: (v) => {
    app.dataset.level = v.n ? v.level : "empty";
    app.dataset.thumbs = String(v.drawnThumbs);
    app.dataset.visible = String(v.visible);
  },
});
window.kinscopeMap = {
  // Read-only hooks for tests and scripts: the view's transform and the current selection.
  view: () => ({ scale: view.scale, tx: view.tx, ty: view.ty, level: view.level, thumbs: view.drawnThumbs }),
  selectedIds: () => view.selectedIds(),
};

async function load(layer) {
  showMessage(errorEl, "");
  app.dataset.level = "loading";
  statusEl.textContent = "Loading the map…";
  let offset = 0, ids, x, y;
  try {
    do {
      const part = await api("/api/map", { layer, offset });
      if (offset === 0) {
        state.total = part.total;
        state.grid = part.grid;
        state.folders = part.folders;
        state.changes = part.changes;
        ids = new Float64Array(part.total);
        x = new Float32Array(part.total);
        y = new Float32Array(part.total);
        state.folder = new Int32Array(part.total);
        state.day = new Int32Array(part.total);
      }
      const it = part.items;
      for (let k = 0; k < part.count; k++) {
        const i = part.offset + k;
        ids[i] = it.id[k];
        x[i] = it.x[k] / part.grid;
        y[i] = it.y[k] / part.grid;
        state.folder[i] = it.folder[k];
        state.day[i] = it.day[k];
      }
      offset = part.next;
      if (offset !== null) statusEl.textContent = `Loading the map… ${offset.toLocaleString()} of ${part.total.toLocaleString()} items`;
    } while (offset !== null);
  } catch (err) {
    app.dataset.level = "empty";
    statusEl.textContent = "";
    showMessage(errorEl, err instanceof ApiError ? err.message : String(err));
    view.setPoints(new Float64Array(0), new Float32Array(0), new Float32Array(0), 0);
    return;
  }
  state.layer = layer;
  view.setPoints(ids, x, y, state.total);
  fillFolders();
  applyFilter();
  describe();
}

function describe() {
  const c = state.changes || {};
  const parts = [`${state.total.toLocaleString()} items on the map.`];
  if (c.added) parts.push(`${c.added.toLocaleString()} indexed since it was laid out were placed by their nearest neighbours.`);
  if (c.unplaced) parts.push(`${c.unplaced.toLocaleString()} indexed since are not on it yet: run kinscope map to add them.`);
  statusEl.textContent = parts.join(" ");
}

function fillFolders() {
  setRoot(state.folders.map((folder) => ({ folder })));
  const select = document.getElementById("map-folder");
  select.replaceChildren(new Option("All folders", ""));
  for (const f of state.folders) select.append(new Option(shortFolder(f) || f, f));
}

function dayOf(input) {
  return input.value ? Math.floor(Date.parse(input.value + "T00:00:00Z") / DAY_MS) : null;
}

function applyFilter() {
  const folder = document.getElementById("map-folder").value;
  const from = dayOf(document.getElementById("map-from"));
  const to = dayOf(document.getElementById("map-to"));
  const okFolder = new Uint8Array(state.folders.length).fill(1);
  if (folder) state.folders.forEach((f, k) => (okFolder[k] = f === folder || f.startsWith(folder + "/") ? 1 : 0));
  let kept = 0;
  for (let i = 0; i < view.n; i++) {
    const d = state.day[i];
    const ok = okFolder[state.folder[i]] && (from === null || d >= from) && (to === null || d <= to) ? 1 : 0;
    view.active[i] = ok;
    if (!ok) view.selected[i] = 0;
    kept += ok;
  }
  const filtered = folder || from !== null || to !== null;
  if (view.n) describe();
  if (filtered) statusEl.textContent += ` ${kept.toLocaleString()} pass the filter; the rest are greyed.`;
  showSelection();
  view.redraw();
}

// --- pointer: pan, zoom, hover, choose, box and lasso -------------------------------------------
let drag = null;

function local(e) {
  const r = canvasEl.getBoundingClientRect();
  return [e.clientX - r.left, e.clientY - r.top];
}

canvasEl.addEventListener("wheel", (e) => {
  e.preventDefault();
  const [sx, sy] = local(e);
  view.zoomAt(Math.pow(1.2, -e.deltaY / 100), sx, sy);
}, { passive: false });

canvasEl.addEventListener("pointerdown", (e) => {
  const [sx, sy] = local(e);
  const mode = e.shiftKey && state.mode === "move" ? "box" : state.mode;
  drag = { mode, sx, sy, lx: sx, ly: sy, moved: false, add: e.shiftKey, points: [[sx, sy]] };
  canvasEl.setPointerCapture(e.pointerId);
});

canvasEl.addEventListener("pointermove", (e) => {
  const [sx, sy] = local(e);
  if (!drag) return hover(sx, sy);
  drag.moved = drag.moved || Math.abs(sx - drag.sx) + Math.abs(sy - drag.sy) > 3;
  if (drag.mode === "move") view.pan(sx - drag.lx, sy - drag.ly);
  else if (drag.mode === "box") view.overlay = { kind: "box", x0: Math.min(drag.sx, sx), y0: Math.min(drag.sy, sy), x1: Math.max(drag.sx, sx), y1: Math.max(drag.sy, sy) };
  else {
    drag.points.push([sx, sy]);
    view.overlay = { kind: "lasso", points: drag.points };
  }
  drag.lx = sx;
  drag.ly = sy;
  if (drag.mode !== "move") view.redraw();
});

canvasEl.addEventListener("pointerup", (e) => {
  const [sx, sy] = local(e);
  const d = drag;
  drag = null;
  if (!d) return;
  if (!d.moved) return choose(view.nearest(sx, sy));
  if (d.mode !== "move" && view.overlay) {
    view.selectShape(view.overlay, d.add);
    view.overlay = null;
    showSelection();
  }
});

canvasEl.addEventListener("dblclick", (e) => {
  const i = view.nearest(...local(e));
  if (i >= 0) window.location.href = `/items/${view.ids[i]}`;
});

canvasEl.addEventListener("pointerleave", () => {
  tip.hidden = true;
  lastPointer = null;
});

/** Where + and - zoom: on the chosen image while it is in view, else where the pointer last was, else on the
    dot nearest the middle (the middle of a map can be empty, and zooming there sends every dot away). */
let lastPointer = null;
canvasEl.addEventListener("pointermove", (e) => (lastPointer = local(e)));
function zoomCentre() {
  const { w, h } = view.size();
  if (view.highlight >= 0) {
    const [sx, sy] = view.toScreen(view.highlight);
    if (sx >= 0 && sx <= w && sy >= 0 && sy <= h) return [sx, sy];
  }
  if (lastPointer) return lastPointer;
  const i = view.nearest(w / 2, h / 2, Math.max(w, h));
  return i >= 0 ? view.toScreen(i) : [w / 2, h / 2];
}

canvasEl.addEventListener("keydown", (e) => {
  const step = e.shiftKey ? 240 : 60;
  const keys = {
    ArrowLeft: () => view.pan(step, 0), ArrowRight: () => view.pan(-step, 0),
    ArrowUp: () => view.pan(0, step), ArrowDown: () => view.pan(0, -step),
    "+": () => view.zoomAt(1.25, ...zoomCentre()), "=": () => view.zoomAt(1.25, ...zoomCentre()),
    "-": () => view.zoomAt(0.8, ...zoomCentre()), 0: () => view.fit(),
    Escape: () => clearSelection(),
    Enter: () => view.highlight >= 0 && (window.location.href = `/items/${view.ids[view.highlight]}`),
  };
  if (keys[e.key]) {
    e.preventDefault();
    keys[e.key]();
  }
});

document.querySelectorAll('input[name="map-mode"]').forEach((input) =>
  input.addEventListener("change", () => {
    state.mode = input.value;
    canvasEl.classList.toggle("is-drawing", state.mode !== "move");
  }));

async function itemOf(id) {
  if (!items.has(id)) items.set(id, api(`/api/items/${id}`).catch(() => null));
  return items.get(id);
}

async function hover(sx, sy) {
  const i = view.nearest(sx, sy);
  if (i < 0) {
    tip.hidden = true;
    return;
  }
  const id = view.ids[i];
  tip.dataset.id = String(id);
  document.getElementById("map-tip-thumb").src = `/media/items/${id}/thumbnail?size=128`;
  document.getElementById("map-tip-name").textContent = "";
  const { w } = view.size();
  tip.style.left = `${Math.min(sx + 14, w - 170)}px`;
  tip.style.top = `${sy + 14}px`;
  tip.hidden = false;
  const item = await itemOf(id);
  if (item && tip.dataset.id === String(id)) {
    document.getElementById("map-tip-name").textContent = `${item.name} · ${shortFolder(item.folder)} · ${item.date}`;
  }
}

async function choose(i) {
  const panel = document.getElementById("map-item");
  view.highlight = i;
  view.redraw();
  if (i < 0) {
    panel.hidden = true;
    return;
  }
  const id = view.ids[i];
  const item = await itemOf(id);
  if (!item) return;
  document.getElementById("map-item-thumb").src = `/media/items/${id}/thumbnail?size=128`;
  document.getElementById("map-item-thumb").alt = `Thumbnail of ${item.name}`;
  document.getElementById("map-item-name").replaceChildren(...breakable(item.name));
  document.getElementById("map-item-path").replaceChildren(...breakable(item.path));
  document.getElementById("map-item-date").textContent = `${item.width} × ${item.height} · ${item.date}`;
  document.getElementById("map-item-search").href = `/?item=${id}&layer=${encodeURIComponent(state.layer)}`;
  document.getElementById("map-item-open").href = `/items/${id}`;
  panel.hidden = false;
}

// --- selection and its export ---------------------------------------------------------------
function showSelection() {
  const n = view.n ? view.selectedCount() : 0;
  app.dataset.selected = String(n);
  document.getElementById("map-selection").textContent = n ? `${n.toLocaleString()} items selected.` : "Nothing selected.";
  for (const id of ["map-csv", "map-json", "map-clear"]) document.getElementById(id).disabled = n === 0;
}

function clearSelection() {
  view.selected.fill(0);
  view.redraw();
  showSelection();
}

async function selectedPaths() {
  const ids = view.selectedIds();
  const out = [];
  for (let k = 0; k < ids.length; k += 50000) {
    const answer = await api("/api/map/paths", null, {
      method: "POST",
      headers: { "Content-Type": "application/json" },
      body: JSON.stringify({ ids: ids.slice(k, k + 50000) }),
    });
    out.push(...answer.items);
  }
  return out;
}

function download(name, type, text) {
  const url = URL.createObjectURL(new Blob([text], { type }));
  const a = Object.assign(document.createElement("a"), { href: url, download: name });
  document.body.append(a);
  a.click();
  a.remove();
  setTimeout(() => URL.revokeObjectURL(url), 10000);
}

async function exportAs(kind) {
  try {
    const rows = await selectedPaths();
    if (kind === "json") download("kinscope-selection.json", "application/json", JSON.stringify(rows, null, 1));
    else download("kinscope-selection.csv", "text/csv", "id,path\n" + rows.map((r) => `${r.id},"${r.path.replaceAll('"', '""')}"`).join("\n") + "\n");
  } catch (err) {
    showMessage(errorEl, err.message);
  }
}

document.getElementById("map-csv").addEventListener("click", () => exportAs("csv"));
document.getElementById("map-json").addEventListener("click", () => exportAs("json"));
document.getElementById("map-clear").addEventListener("click", clearSelection);
document.getElementById("map-layer").addEventListener("change", (e) => load(e.target.value));
document.getElementById("map-folder").addEventListener("change", applyFilter);
document.getElementById("map-from").addEventListener("change", applyFilter);
document.getElementById("map-to").addEventListener("change", applyFilter);
document.getElementById("map-filter").addEventListener("reset", () => setTimeout(applyFilter, 0));

load(state.layer);
