"""Attribution: expected relative risk over an exposure distribution, PAF, PIF,
the categorical comparison and the burden's distribution over exposure."""
