// The item page: this item's own neighbours, on the layer the user picks.
import { api, query, resultCard, setRoot, showMessage } from "./common.js";

const page = document.getElementById("item-page");
const itemId = Number(page.dataset.itemId);
const layerSelect = document.getElementById("item-layer");
const results = document.getElementById("results");
const statusLine = document.getElementById("status");
const errorLine = document.getElementById("search-error");
let seq = 0;

async function neighbours() {
  const mine = ++seq;
  const layer = layerSelect.value;
  showMessage(errorLine, "");
  statusLine.textContent = "Searching…";
  results.setAttribute("aria-busy", "true");
  try {
    const r = await api("/api/search", { item: itemId, layer, k: 12 });
    if (mine !== seq) return;
    results.replaceChildren();
    r.results.forEach((res, i) => {
      // "Why it matched" opens the search page with this item as the query and that result explained.
      const href = `/?${query({ item: itemId, layer: layer === page.dataset.defaultLayer ? null : layer, explain: res.id })}`;
      results.append(resultCard(res, i + 1, { explainHref: href }));
    });
    statusLine.textContent = r.results.length
      ? `${r.results.length} closest items, best first. Select one to see why it matched.`
      : "No other items to compare with.";
  } catch (err) {
    if (mine !== seq) return;
    statusLine.textContent = "";
    showMessage(errorLine, err.message);
  } finally {
    if (mine === seq) results.removeAttribute("aria-busy");
  }
}

layerSelect.addEventListener("change", neighbours);

api("/api/folders")
  .then((f) => setRoot(f.folders))
  .catch(() => {})
  .finally(neighbours);
