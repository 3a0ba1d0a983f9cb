"""A select whose options are written in Python: the same HTML as Django's Select, without a template per option.

Django renders each <option> through a template include (about 25 µs each); a filter offering every tank of a
facility (400 options) spent 10 ms of its page there. Groups (optgroups) keep Django's own rendering.
"""
from django import forms
from django.utils.html import conditional_escape
from django.utils.safestring import mark_safe


def _attrs(attrs: dict) -> str:
    """As django/forms/widgets/attrs.html writes them."""
    return "".join(f" {name}" if value is True else f' {name}="{conditional_escape(value)}"'
                   for name, value in attrs.items() if value is not False)


class QuickSelect(forms.Select):
    def render(self, name, value, attrs=None, renderer=None):
        choices = list(self.choices)
        if self.allow_multiple_selected or any(isinstance(label, (list, tuple)) for _, label in choices):
            return super().render(name, value, attrs, renderer)
        selected_values = set(self.format_value(value))
        options, has_selected = [], False
        for option_value, label in choices:
            option_value = "" if option_value is None else option_value
            selected = not has_selected and str(option_value) in selected_values
            has_selected |= selected
            options.append(f'\n  <option value="{conditional_escape(str(option_value))}"'
                           f'{" selected" if selected else ""}>{conditional_escape(label)}</option>\n')  # the include's newline
        final = self.build_attrs(self.attrs, attrs)
        return mark_safe(f'<select name="{conditional_escape(name)}"{_attrs(final)}>{"".join(options)}\n</select>')
