// Queue: counts by status and the running and recent fits, refreshed by polling the status API.

import { api, poll, query } from "./api.js";
import { h, errorBox } from "./dom.js";
import { fitRows, fitTableHead } from "./common.js";

const STATUSES = ["queued", "running", "succeeded", "failed", "cancelled"];
const LABELS = { queued: "Waiting", running: "Fitting now", succeeded: "Finished", failed: "Failed", cancelled: "Cancelled" };

export function renderQueue(main, _params, search) {
  let filter = search.get("status") ?? "";
  const counts = h("section", { class: "counts", id: "counts" }, STATUSES.map((st) => h("div", { class: `count st-${st}`, "data-count": st }, h("span", { class: "n" }, "…"), h("span", { class: "label" }, LABELS[st]))));
  const activeBody = h("tbody", {});
  const recentBody = h("tbody", {});
  const stamp = h("span", { class: "muted", id: "updated" }, "loading…");
  const problem = h("div", {});
  const select = h(
    "select",
    {
      id: "recent-status",
      onchange: () => {
        filter = select.value;
        history.replaceState(null, "", `/ui/queue${query({ status: filter })}`);
        refresh();
      },
    },
    h("option", { value: "" }, "all statuses"),
    STATUSES.map((st) => h("option", { value: st, selected: st === filter }, st)),
  );

  main.append(
    h("div", { class: "page-head" }, h("h1", {}, "Fitting queue"), stamp),
    counts,
    problem,
    h("section", { class: "card" }, h("h2", {}, "In progress"), h("table", { class: "fits", id: "active" }, fitTableHead(), activeBody)),
    h(
      "section",
      { class: "card" },
      h("div", { class: "card-head" }, h("h2", {}, "Recent fits"), h("label", {}, "show ", select)),
      h("table", { class: "fits", id: "recent" }, fitTableHead(), recentBody),
    ),
  );

  async function refresh() {
    try {
      const [q, running, queued, recent] = await Promise.all([
        api.get("/queue"),
        api.get(`/fits${query({ status: "running", limit: 50 })}`),
        api.get(`/fits${query({ status: "queued", limit: 50 })}`),
        api.get(`/fits${query({ status: filter, limit: 30 })}`),
      ]);
      for (const st of STATUSES) counts.querySelector(`[data-count="${st}"] .n`).textContent = String(q[st] ?? 0);
      const active = [...running.items, ...queued.items];
      activeBody.replaceChildren(...(active.length ? active.flatMap((f) => fitRows(f)) : [h("tr", { class: "empty" }, h("td", { colspan: 9 }, "Nothing is waiting or fitting."))]));
      recentBody.replaceChildren(...(recent.items.length ? recent.items.flatMap((f) => fitRows(f)) : [h("tr", { class: "empty" }, h("td", { colspan: 9 }, "No fits yet. Upload a sweep to start one."))]));
      stamp.textContent = `updated ${new Date().toLocaleTimeString()} · refreshes every 2 s`;
      problem.replaceChildren();
    } catch (e) {
      problem.replaceChildren(errorBox(e, "The queue could not be read"));
      throw e;
    }
  }
  return poll(refresh, 2000);
}
