from django.apps import AppConfig


class AccountsConfig(AppConfig):
    name = "labbook.accounts"
    label = "accounts"
    verbose_name = "People, groups and API tokens"
