// sensorledger: draw plotly figures, copy constants, say when a request failed.
// No build step; runs after htmx (both deferred). Works on first load and after every htmx swap.
"use strict";

(function () {
  const PLOT_CONFIG = {
    responsive: true,
    displaylogo: false,
    modeBarButtonsToRemove: ["select2d", "lasso2d", "autoScale2d", "toggleSpikelines"],
    toImageButtonOptions: { format: "png", scale: 2 },
  };
  const STATIC_CONFIG = { staticPlot: true, responsive: false, displaylogo: false };

  // Every element with data-figure (a plotly figure as JSON) is drawn once.
  function drawFigures(root) {
    if (!window.Plotly) return;
    const scope = root && root.querySelectorAll ? root : document;
    const found = Array.from(scope.querySelectorAll("[data-figure]"));
    if (scope.matches && scope.matches("[data-figure]")) found.push(scope);
    for (const el of found) {
      if (el.dataset.drawn === "yes") continue;
      try {
        const figure = JSON.parse(el.dataset.figure);
        // data-static="yes": a printable plot (no hover, no mode bar, fixed size from the layout)
        const config = el.dataset.static === "yes" ? STATIC_CONFIG : PLOT_CONFIG;
        // a fixed-size (printable) plot narrower than its layout on a phone: draw it to fit
        if (el.dataset.static === "yes" && figure.layout && figure.layout.width &&
            el.clientWidth > 0 && el.clientWidth < figure.layout.width) {
          figure.layout.width = el.clientWidth;
        }
        Plotly.newPlot(el, figure.data, figure.layout, config);
        el.dataset.drawn = "yes";
      } catch (err) {
        el.textContent = "This plot could not be drawn: " + err;
        el.classList.add("plot-failed");
      }
    }
  }

  // A button with data-copy-from="ID" copies the text of element ID to the clipboard.
  function onCopy(event) {
    const button = event.target.closest("[data-copy-from]");
    if (!button) return;
    const source = document.getElementById(button.dataset.copyFrom);
    if (!source) return;
    const text = source.textContent.trim() + "\n";
    const done = () => {
      const label = button.textContent;
      button.textContent = "Copied";
      setTimeout(() => { button.textContent = label; }, 1500);
    };
    if (navigator.clipboard && window.isSecureContext) {
      navigator.clipboard.writeText(text).then(done, () => fallbackCopy(text, done));
    } else {
      fallbackCopy(text, done);
    }
  }

  function fallbackCopy(text, done) {
    const area = document.createElement("textarea");
    area.value = text;
    area.setAttribute("readonly", "");
    area.style.position = "fixed";
    area.style.opacity = "0";
    document.body.appendChild(area);
    area.select();
    try { document.execCommand("copy"); done(); } finally { area.remove(); }
  }

  // htmx does not swap 4xx/5xx answers (except 422): say so instead of doing nothing.
  function showProblem(text) {
    const box = document.getElementById("request-problem");
    if (!box) return;
    box.textContent = text;
    box.hidden = false;
  }

  function hideProblem() {
    const box = document.getElementById("request-problem");
    if (box) box.hidden = true;
  }

  // "/" jumps to the serial box (the fleet search, or the one in the top bar), ready for a scan.
  function onSlash(event) {
    if (event.key !== "/" || event.ctrlKey || event.metaKey || event.altKey) return;
    const active = document.activeElement;
    if (active && (active.isContentEditable || /^(INPUT|TEXTAREA|SELECT)$/.test(active.tagName))) {
      return;
    }
    const box = document.getElementById("q") || document.querySelector("[data-scan-box]");
    if (!box) return;
    event.preventDefault();
    box.focus();
    box.select();
  }

  document.addEventListener("click", onCopy);
  document.addEventListener("keydown", onSlash);
  document.addEventListener("DOMContentLoaded", () => drawFigures(document));
  document.addEventListener("htmx:load", (event) => drawFigures(event.detail.elt));
  document.addEventListener("htmx:afterSettle", (event) => drawFigures(event.detail.elt));
  document.addEventListener("htmx:beforeRequest", hideProblem);
  document.addEventListener("htmx:responseError", (event) => {
    const xhr = event.detail.xhr;
    if (xhr.status === 403 && xhr.getResponseHeader("X-Refused") === "csrf") {
      showProblem("This page is out of date: you signed in again (or out) since it was loaded, " +
        "so the server refused the request and nothing was changed. Copy what you typed, " +
        "reload the page and send it again.");
      return;
    }
    showProblem("The server answered " + xhr.status + " " + (xhr.statusText || "") +
      ". Nothing was changed on this page; reload it and try again.");
  });
  document.addEventListener("htmx:sendError", () => {
    showProblem("The server could not be reached. Check the connection and try again.");
  });
  // A plot in a collapsed section loads when it is opened: htmx checks "revealed" on scroll.
  document.addEventListener(
    "toggle",
    function (event) {
      if (event.target.open) window.dispatchEvent(new Event("scroll"));
    },
    true
  );
})();
