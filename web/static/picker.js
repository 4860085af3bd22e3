// The archive picker: pages of thumbnails, narrowed by folder and by part of a file name (or an item's id),
// moved through with the arrow keys. Selecting an item hands it to `onPick`.
import { api, breakable, el, shortFolder, showMessage } from "./common.js";

const PAGE = 60;
const TYPING_PAUSE = 250; // ms after the last key before the name filter asks the server

export function setUpPicker(onPick) {
  const $ = (id) => document.getElementById(id);
  const dialog = $("browser-dialog");
  const folder = $("browser-folder");
  const name = $("browser-name");
  const grid = $("browser-grid");
  const status = $("browser-status");
  const error = $("browser-error");
  const more = $("browser-more");
  const state = { offset: 0, total: 0, loaded: false, seq: 0, timer: 0 };

  function card(item) {
    const img = el("img", { src: `${item.thumbnail}?size=128`, alt: "", loading: "lazy", decoding: "async", width: 128, height: 128 });
    const button = el(
      "button",
      { type: "button", class: "browser-item", title: item.path, "aria-label": `Search with ${item.name} (${shortFolder(item.folder)})` },
      el("span", { class: "thumb" }, img),
      el("span", { class: "browser-name" }, breakable(item.name)),
    );
    button.addEventListener("click", () => onPick(item));
    return el("li", {}, button);
  }

  function describe() {
    const text = name.value.trim();
    const byId = /^\d+$/.test(text) ? ` or whose id is ${text}` : "";
    const filtered = text ? ` whose name holds “${text}”${byId}` : "";
    if (!state.total) return `No items${filtered}${folder.value ? " in this folder" : ""}.`;
    return `Showing ${state.offset.toLocaleString()} of ${state.total.toLocaleString()} items${filtered}. `
      + "Select one to search with it; the arrow keys move between them.";
  }

  async function load(reset) {
    const seq = ++state.seq;
    if (reset) state.offset = 0;
    showMessage(error, "");
    status.textContent = "Loading…";
    try {
      const page = await api("/api/items", { offset: state.offset, limit: PAGE, folder: folder.value, name: name.value.trim() });
      if (seq !== state.seq) return; // a newer filter has been asked for
      if (reset) grid.replaceChildren();
      state.total = page.total;
      state.offset += page.items.length;
      grid.append(...page.items.map(card));
      state.loaded = true;
      status.textContent = describe();
      more.hidden = state.offset >= state.total;
    } catch (err) {
      if (seq !== state.seq) return;
      status.textContent = "";
      showMessage(error, err.message);
    }
  }

  /** Arrow keys move the focus through the grid: left and right by one, up and down by a row. */
  function move(e) {
    const buttons = Array.from(grid.querySelectorAll("button.browser-item"));
    const at = buttons.indexOf(document.activeElement);
    if (at < 0) return;
    const top = buttons[0].getBoundingClientRect().top;
    const columns = Math.max(1, buttons.filter((b) => Math.abs(b.getBoundingClientRect().top - top) < 2).length);
    const step = { ArrowLeft: -1, ArrowRight: 1, ArrowUp: -columns, ArrowDown: columns }[e.key];
    let to = e.key === "Home" ? 0 : e.key === "End" ? buttons.length - 1 : step === undefined ? null : at + step;
    if (to === null) return;
    e.preventDefault();
    if (e.key === "ArrowUp" && to < 0) {
      name.focus(); // from the first row back up to the name box
      return;
    }
    to = Math.max(0, Math.min(buttons.length - 1, to));
    buttons[to].focus();
  }

  grid.addEventListener("keydown", move);
  name.addEventListener("keydown", (e) => {
    const first = grid.querySelector("button.browser-item");
    if (e.key === "ArrowDown" && first) {
      e.preventDefault();
      first.focus();
    } else if (e.key === "Enter") {
      e.preventDefault();
      clearTimeout(state.timer);
      load(true);
    }
  });
  name.addEventListener("input", () => {
    clearTimeout(state.timer);
    state.timer = setTimeout(() => load(true), TYPING_PAUSE);
  });
  folder.addEventListener("change", () => load(true));
  more.addEventListener("click", () => load(false));

  return {
    open() {
      dialog.showModal();
      if (!state.loaded) load(true);
      name.focus();
    },
  };
}
