// The preparation log works without this file (every button posts the form and the page comes
// back). With it: a step is removed in place with the focus kept somewhere useful, and Enter
// pressed while the steps of a just-chosen recipe are still on their way waits for them, so
// what is saved is what is shown.
(function () {
  "use strict";

  function focusable(el) {
    return el && el.querySelector("input:not([type=hidden]), select, textarea, button");
  }

  document.addEventListener("click", function (event) {
    var button = event.target.closest("[data-remove-step]");
    if (!button) {
      return;
    }
    event.preventDefault();
    var step = button.closest(".step");
    var next = step.nextElementSibling || step.previousElementSibling;
    step.remove();
    var target = focusable(next) || document.getElementById("add-step-first");
    if (target) {
      target.focus();
    }
  });

  document.addEventListener("submit", function (event) {
    var form = event.target;
    if (form.id !== "log-form") {
      return;
    }
    if (!form.querySelector(".htmx-request")) {
      // A second Enter while the first is on its way would only meet "already logged".
      if (form.dataset.sent) {
        event.preventDefault();
      }
      form.dataset.sent = "1";
      return;
    }
    event.preventDefault();
    var submitter = event.submitter;
    var done = false;
    function resubmit() {
      if (done) {
        return;
      }
      done = true;
      form.requestSubmit(submitter && submitter.form === form ? submitter : undefined);
    }
    document.addEventListener("htmx:afterSettle", resubmit, { once: true });
    // A request that fails or is cancelled settles nothing: save what is shown after a pause.
    window.setTimeout(resubmit, 2500);
  });

  // Back to the page from the browser's cache: it may be sent again.
  window.addEventListener("pageshow", function () {
    var form = document.getElementById("log-form");
    if (form) {
      delete form.dataset.sent;
    }
  });
})();
