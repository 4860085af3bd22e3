// The cautions above the results: folded away for the rest of the browser session when the user asks
// (sessionStorage), never removed. The heading and a one-line note stay, the list can be unfolded again,
// and the same cautions stay in the page's footer.
const KEY = "kinscope.cautions.folded";

export function setUpCautions() {
  const list = document.getElementById("cautions-list");
  const toggle = document.getElementById("cautions-toggle");
  const note = document.getElementById("cautions-note");
  if (!list || !toggle) return;
  const show = (folded) => {
    list.hidden = folded;
    note.hidden = !folded;
    const rest = document.createElement("span");
    rest.className = "visually-hidden";
    rest.textContent = folded ? " (the cautions)" : " the cautions for this browser session";
    toggle.replaceChildren(folded ? "Show them" : "Hide", rest);
    toggle.setAttribute("aria-expanded", String(!folded));
    document.getElementById("cautions").classList.toggle("is-folded", folded);
  };
  let folded = false;
  try {
    folded = window.sessionStorage.getItem(KEY) === "1";
  } catch (err) {
    folded = false; // storage refused (a private mode): they simply stay unfolded
  }
  show(folded);
  toggle.addEventListener("click", () => {
    folded = !folded;
    try {
      if (folded) window.sessionStorage.setItem(KEY, "1");
      else window.sessionStorage.removeItem(KEY);
    } catch (err) {
      // not kept past this page then
    }
    show(folded);
  });
}
