<#
.SYNOPSIS
  Registers the qcd watch service as a Windows scheduled task (start-up and logon, restarted
  on failure).

.EXAMPLE
  powershell -ExecutionPolicy Bypass -File install-qcd-task.ps1 `
      -QcdExe C:\qcd\venv\Scripts\qcd.exe -Config C:\qcd\qcd.toml -User qcd

.NOTES
  Run from an elevated PowerShell. You are asked for the account's password: the task stores
  it so that it runs without a logon and can read network shares. -Uninstall removes the task.
#>
param(
    [string]$QcdExe = "C:\qcd\venv\Scripts\qcd.exe",
    [string]$Config = "C:\qcd\qcd.toml",
    [string]$User = "$env:COMPUTERNAME\qcd",
    [string]$TaskName = "qcd watch",
    [switch]$Uninstall
)
$ErrorActionPreference = "Stop"

if ($Uninstall) {
    Stop-ScheduledTask -TaskName $TaskName -ErrorAction SilentlyContinue
    Unregister-ScheduledTask -TaskName $TaskName -Confirm:$false
    Write-Host "Removed the scheduled task '$TaskName'."
    exit 0
}

if (-not (Test-Path -LiteralPath $QcdExe)) { throw "qcd not found at $QcdExe (install it first, see README.md)" }
if (-not (Test-Path -LiteralPath $Config)) { throw "config not found at $Config (write one with: qcd init $Config)" }

# check the config before registering: a mistake shows here, not in a silent task
& $QcdExe status --config $Config | Out-Null
if ($LASTEXITCODE -eq 2) { throw "qcd rejected the config $Config (run: qcd status --config $Config)" }

$template = Join-Path $PSScriptRoot "qcd-task.xml"
$xml = Get-Content -LiteralPath $template -Raw
$esc = { param($s) [System.Security.SecurityElement]::Escape($s) }
$xml = $xml.Replace("QCD_EXE", (& $esc $QcdExe)).Replace("QCD_CONFIG", (& $esc $Config))
$xml = $xml.Replace("QCD_WORKDIR", (& $esc (Split-Path -Parent $Config))).Replace("QCD_USER", (& $esc $User))

$cred = Get-Credential -UserName $User -Message "Password of the account that runs qcd"
Register-ScheduledTask -TaskName $TaskName -Xml $xml -User $cred.UserName `
    -Password $cred.GetNetworkCredential().Password -Force | Out-Null
Start-ScheduledTask -TaskName $TaskName
Start-Sleep -Seconds 15
& $QcdExe status --config $Config
Write-Host "Registered '$TaskName'. Check it any time with: qcd status --config $Config"
