// A scanner types a standard's name then Enter: in the picker, Enter moves on to the next field
// instead of submitting the calibration form.
(function () {
  if (window.standardPickerReady) return;
  window.standardPickerReady = true;
  document.addEventListener("keydown", function (event) {
    var field = event.target;
    if (event.key !== "Enter" || !field.matches || !field.matches("[data-scan-field]")) return;
    event.preventDefault();
    var fields = Array.prototype.slice.call(field.form.querySelectorAll("input, select, textarea"))
      .filter(function (f) { return f.type !== "hidden" && !f.disabled; });
    var next = fields[fields.indexOf(field) + 1];
    if (next) next.focus();
  });
})();
