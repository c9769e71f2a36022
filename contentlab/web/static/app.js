// contentlab web app: send the page's CSRF value with every htmx request (the server checks it
// against its cookie). No other script runs on these pages.
document.addEventListener("htmx:configRequest", function (event) {
  var meta = document.querySelector('meta[name="csrf-token"]');
  if (meta) {
    event.detail.headers["X-CSRF-Token"] = meta.getAttribute("content");
  }
});
