// Keyboard-first labelling: Enter saves (native form submit), Alt+N marks nothing recognisable.
(function () {
  var form = document.querySelector("[data-label-form]");
  if (!form) return;
  var started = Date.now();
  form.addEventListener("submit", function () {
    form.querySelector("[data-seconds]").value = ((Date.now() - started) / 1000).toFixed(1);
  });
  document.addEventListener("keydown", function (e) {
    if (e.altKey && (e.key === "n" || e.key === "N")) {
      e.preventDefault();
      form.querySelector("[data-nothing]").click();
    }
  });
  // Keys pressed before this point are lost; tests (and impatient people) can wait for it.
  form.setAttribute("data-ready", "1");
})();
