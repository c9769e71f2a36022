// contentlab web app: send the page's CSRF value with every htmx request (the server checks it
// against its cookie). This file and htmx are the only scripts of these pages.
document.addEventListener("htmx:configRequest", function (event) {
  var meta = document.querySelector('meta[name="csrf-token"]');
  if (meta) {
    event.detail.headers["X-CSRF-Token"] = meta.getAttribute("content");
  }
});

// A refused or failed htmx request (an expired form, a server problem) says so where the answer
// would have gone, as plain text, instead of leaving the page silently unchanged.
document.addEventListener("htmx:responseError", function (event) {
  var target = event.detail.target;
  if (!target) { return; }
  var text = "The server did not accept this (HTTP " + event.detail.xhr.status + ").";
  var found = /<p class="error" role="alert">([\s\S]*?)<\/p>/.exec(event.detail.xhr.responseText || "");
  if (found) {
    // Parsed in an inert document (nothing in it loads or runs) and read back as text only.
    text = new DOMParser().parseFromString(found[1], "text/html").body.textContent;
  }
  var p = document.createElement("p");
  p.className = "error";
  p.setAttribute("role", "alert");
  p.textContent = text + " Reload the page if this persists.";
  target.replaceChildren(p);
});
