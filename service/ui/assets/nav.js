// Client-side navigation, kept apart from the router so views can navigate without importing it.

let router = () => {};

export function setRouter(fn) {
  router = fn;
}

export function navigate(href, { replace = false } = {}) {
  if (replace) history.replaceState(null, "", href);
  else history.pushState(null, "", href);
  router();
}
